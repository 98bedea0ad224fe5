//! Regression tests for the two readers of untrusted bytes, the plan reader
//! (`plan::parse`) and the CSV reader (`data::read_table`): each must answer
//! with `Ok` or `Err`, never panic, and finish.
//!
//! Three sources of inputs:
//! - every file in tests/fuzz/regressions/ (`plan-*` files go to the plan
//!   reader, `csv-*` files to the CSV reader): inputs kept from fuzzing runs
//!   (tests/fuzz/README.md) and hand-made ones, each named after what it does;
//! - adversarial inputs too large to store, built here: nesting and lists far
//!   beyond the plan limits, a mapping with a hundred thousand keys, a list with
//!   as many entries and a
//!   header with two hundred thousand columns. Before the limits and the
//!   set-based duplicate checks, the last two kept the readers busy for more
//!   than two minutes (the duplicate-key and duplicate-column checks compared
//!   every name with every earlier one); now each is refused at once with a
//!   located `limit` error, which is what these tests assert.
//!
//! - a small mutation fuzzer (module `mutations`, 256 proptest cases per
//!   reader) that mutates the seed files on every `cargo test`.
//!
//! No timing is asserted (a slow machine must not fail the suite); a
//! regression to quadratic work shows as a test that takes minutes.

use cairn::ErrorKind;
use std::path::PathBuf;

fn regressions_folder() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fuzz/regressions")
}

/// Run `read` on `bytes`, turning a panic into a test failure that names the input.
fn survives<T>(
    name: &str,
    read: impl FnOnce() -> Result<T, cairn::Error> + std::panic::UnwindSafe,
) -> Result<T, cairn::Error> {
    match std::panic::catch_unwind(read) {
        Ok(result) => result,
        Err(_) => panic!("{name}: the reader panicked"),
    }
}

#[test]
fn every_stored_input_is_answered_without_a_panic() {
    let mut entries: Vec<PathBuf> = std::fs::read_dir(regressions_folder())
        .expect("tests/fuzz/regressions exists")
        .map(|entry| entry.expect("entry").path())
        .collect();
    entries.sort();
    let mut plans = 0;
    let mut tables = 0;
    for path in &entries {
        let name = path
            .file_name()
            .and_then(|name| name.to_str())
            .unwrap_or("?")
            .to_string();
        let bytes = std::fs::read(path).expect("read regression input");
        if name.starts_with("plan-") {
            let _ = survives(&name, || cairn::plan::parse(&bytes, "plan.yaml"));
            plans += 1;
        } else if name.starts_with("csv-") {
            let _ = survives(&name, || cairn::data::read_table(&bytes, "data.csv"));
            tables += 1;
        }
    }
    assert!(
        plans > 0 && tables > 0,
        "expected stored inputs for both readers; found {plans} plan and {tables} CSV inputs"
    );
}

fn assert_limit<T: std::fmt::Debug>(
    name: &str,
    result: Result<T, cairn::Error>,
    line: Option<usize>,
) {
    let error = result.expect_err(name);
    assert_eq!(error.kind(), ErrorKind::Limit, "{name}: {error}");
    let location = error.problems[0].location.clone().expect("located");
    assert_eq!(location.line, line, "{name}: {error}");
}

#[test]
fn deep_nesting_is_refused_at_the_limit() {
    // 300 000 levels of flow lists (600 kB, under the size limit); the reader
    // stops building the tree at level 64 (common practice: no recursion or
    // tree deeper than a fixed bound over untrusted input).
    let text = format!("{}{}", "[".repeat(300_000), "]".repeat(300_000));
    assert_limit(
        "deep lists",
        survives("deep lists", || {
            cairn::plan::parse(text.as_bytes(), "plan.yaml")
        }),
        Some(1),
    );
    let text = format!("{}1{}", "{a: ".repeat(200_000), "}".repeat(200_000));
    assert_limit(
        "deep mappings",
        survives("deep mappings", || {
            cairn::plan::parse(text.as_bytes(), "plan.yaml")
        }),
        Some(1),
    );
    // Block style, one level per line: the error is on the line of the 65th level.
    let text: String = (0..1000)
        .map(|depth| format!("{}k{depth}:\n", "  ".repeat(depth)))
        .collect();
    assert_limit(
        "deep block mappings",
        survives("deep block mappings", || {
            cairn::plan::parse(text.as_bytes(), "plan.yaml")
        }),
        Some(65),
    );
}

#[test]
fn a_mapping_with_a_hundred_thousand_keys_is_refused() {
    let text: String = (0..100_000).map(|index| format!("k{index}: 1\n")).collect();
    assert_limit(
        "many keys",
        survives("many keys", || {
            cairn::plan::parse(text.as_bytes(), "plan.yaml")
        }),
        Some(10_001),
    );
}

#[test]
fn a_list_with_a_hundred_thousand_entries_is_refused() {
    let items: Vec<String> = (0..100_000).map(|index| format!("L{index}")).collect();
    let text = format!("levels: [{}]\n", items.join(", "));
    assert!(
        text.len() <= cairn::plan::limits::MAX_PLAN_BYTES,
        "the input must reach the entry limit, not the size limit"
    );
    assert_limit(
        "long list",
        survives("long list", || {
            cairn::plan::parse(text.as_bytes(), "plan.yaml")
        }),
        Some(1),
    );
}

#[test]
fn many_long_level_lists_within_the_limits_are_read() {
    // Ten factors of 9 000 declared levels each: within every limit, so the plan
    // is checked in full (the duplicate-level check is a set lookup, not a scan
    // of the earlier levels). The plan is otherwise incomplete, so it is an
    // error, but a schema error, not a limit.
    let levels: Vec<String> = (0..9_000).map(|index| format!("L{index}")).collect();
    let mut text = String::from("cairn-plan: 1\nvariables:\n");
    for variable in 0..10 {
        text.push_str(&format!(
            "  V{variable}: {{kind: factor, levels: [{}]}}\n",
            levels.join(", ")
        ));
    }
    let error = survives("long level lists", || {
        cairn::plan::parse(text.as_bytes(), "plan.yaml")
    })
    .expect_err("incomplete plan");
    assert!(
        error
            .problems
            .iter()
            .all(|problem| problem.kind != ErrorKind::Limit),
        "{error}"
    );
}

#[test]
fn a_plan_over_the_size_limit_is_refused_before_parsing() {
    let text = format!("# {}\n", "x".repeat(cairn::plan::limits::MAX_PLAN_BYTES));
    assert_limit(
        "large plan",
        survives("large plan", || {
            cairn::plan::parse(text.as_bytes(), "plan.yaml")
        }),
        None,
    );
}

#[test]
fn a_header_with_two_hundred_thousand_columns_is_refused() {
    let header: Vec<String> = (0..200_000).map(|index| format!("C{index}")).collect();
    let row = vec!["1"; 200_000];
    let text = format!("{}\n{}\n", header.join(","), row.join(","));
    assert_limit(
        "wide header",
        survives("wide header", || {
            cairn::data::read_table(text.as_bytes(), "data.csv")
        }),
        Some(1),
    );
}

#[test]
fn a_header_at_the_column_limit_is_read_and_a_late_duplicate_is_found() {
    let mut header: Vec<String> = (0..cairn::data::MAX_COLUMNS)
        .map(|index| format!("C{index}"))
        .collect();
    let row = vec!["1"; cairn::data::MAX_COLUMNS].join(",");
    let table = survives("header at the limit", || {
        cairn::data::read_table(
            format!("{}\n{row}\n", header.join(",")).as_bytes(),
            "data.csv",
        )
    })
    .expect("a header at the limit is read");
    assert_eq!(table.headers.len(), cairn::data::MAX_COLUMNS);
    let last = header.len() - 1;
    header[last] = "C0".to_string();
    let error = survives("late duplicate", || {
        cairn::data::read_table(
            format!("{}\n{row}\n", header.join(",")).as_bytes(),
            "data.csv",
        )
    })
    .expect_err("a repeated name is an error");
    assert_eq!(error.kind(), ErrorKind::DataFormat);
    assert!(
        error.problems[0]
            .message
            .contains(&format!("columns 1 and {}", cairn::data::MAX_COLUMNS)),
        "{error}"
    );
}

/// A small mutation fuzzer that runs with every `cargo test` (the cargo-fuzz
/// targets need a nightly toolchain and run for minutes): the seed files —
/// the demo plan, the base plan of the bad-input catalogue and their data —
/// with random byte flips, insertions of plan or CSV punctuation, deletions,
/// duplicated slices and truncations. Every mutant must be answered with `Ok`
/// or `Err`; a panic fails the test and proptest shrinks the mutation.
mod mutations {
    use proptest::prelude::*;
    use std::path::PathBuf;

    fn seed(relative: &str) -> Vec<u8> {
        std::fs::read(PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(relative)).expect("seed file")
    }

    #[derive(Clone, Debug)]
    enum Mutation {
        Flip { at: usize, bit: u8 },
        Insert { at: usize, text: &'static str },
        Delete { at: usize, length: usize },
        Duplicate { at: usize, length: usize },
        Truncate { at: usize },
    }

    const PIECES: &[&str] = &[
        "[", "]", "{", "}", ":", ": ", "- ", ",", "\n", "\r\n", "\"", "'", "#", "&a ", "*a", "!t ",
        "---\n", "\t", "|\n", "? ", "\u{FEFF}", "\u{e9}", "\u{0}", "1e999", "~",
    ];

    fn mutation() -> impl Strategy<Value = Mutation> {
        // Positions are fractions of the current length, resolved when applied.
        prop_oneof![
            (any::<usize>(), 0u8..8).prop_map(|(at, bit)| Mutation::Flip { at, bit }),
            (any::<usize>(), prop::sample::select(PIECES))
                .prop_map(|(at, text)| Mutation::Insert { at, text }),
            (any::<usize>(), 1usize..64).prop_map(|(at, length)| Mutation::Delete { at, length }),
            (any::<usize>(), 1usize..256)
                .prop_map(|(at, length)| Mutation::Duplicate { at, length }),
            any::<usize>().prop_map(|at| Mutation::Truncate { at }),
        ]
    }

    fn apply(mut bytes: Vec<u8>, mutations: &[Mutation]) -> Vec<u8> {
        for mutation in mutations {
            let length = bytes.len().max(1);
            match *mutation {
                Mutation::Flip { at, bit } => {
                    if let Some(byte) = bytes.get_mut(at % length) {
                        *byte ^= 1 << bit;
                    }
                }
                Mutation::Insert { at, text } => {
                    let at = at % (bytes.len() + 1);
                    bytes.splice(at..at, text.bytes());
                }
                Mutation::Delete { at, length: count } => {
                    let at = at % length;
                    let end = (at + count).min(bytes.len());
                    if at < end {
                        bytes.drain(at..end);
                    }
                }
                Mutation::Duplicate { at, length: count } => {
                    let at = at % length;
                    let end = (at + count).min(bytes.len());
                    if at < end {
                        let slice: Vec<u8> = bytes[at..end].to_vec();
                        bytes.splice(end..end, slice);
                    }
                }
                Mutation::Truncate { at } => bytes.truncate(at % length),
            }
        }
        bytes
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 256, failure_persistence: None, ..ProptestConfig::default() })]

        #[test]
        fn mutated_plans_never_panic(which in 0usize..2, mutations in prop::collection::vec(mutation(), 1..12)) {
            let original = seed(["plans/demo/plan.yaml", "tests/cases/base/plan.yaml"][which]);
            let bytes = apply(original, &mutations);
            let outcome = std::panic::catch_unwind(|| cairn::plan::parse(&bytes, "plan.yaml").is_ok());
            prop_assert!(outcome.is_ok(), "the plan reader panicked on {:?}", String::from_utf8_lossy(&bytes));
        }

        #[test]
        fn mutated_data_files_never_panic(which in 0usize..3, mutations in prop::collection::vec(mutation(), 1..12)) {
            let original = seed(["plans/demo/data/allocation.csv", "tests/cases/base/data/subjects.csv", "tests/cases/base/data/allocation.csv"][which]);
            let bytes = apply(original, &mutations);
            let outcome = std::panic::catch_unwind(|| cairn::data::read_table(&bytes, "data.csv").is_ok());
            prop_assert!(outcome.is_ok(), "the CSV reader panicked on {:?}", String::from_utf8_lossy(&bytes));
        }
    }
}
