//! Remarks that do not stop a plan: `cairn check` prints them as notes.

mod common;

use common::{Scratch, cairn, copy_tree, root};

#[test]
fn hochberg_and_hommel_draw_a_note_about_their_assumption() {
    // Hochberg (1988) and Hommel (1988) control the familywise error rate under independence or
    // positive dependence of the test statistics (common practice; 2022 FDA guidance on multiple endpoints).
    for procedure in ["hochberg", "hommel"] {
        let study = Scratch::new(&format!("note-{procedure}"));
        copy_tree(&root().join("tests/cases/base"), &study.path);
        let plan = std::fs::read_to_string(study.path.join("plan.yaml")).expect("plan")
            + &format!(
                "multiplicity:\n  procedure: {procedure}\n  hypotheses:\n    - {{id: H1, analysis: primary, contrast: high-vs-placebo}}\n    - {{id: H2, analysis: primary, contrast: low-vs-placebo}}\n"
            );
        std::fs::write(study.path.join("plan.yaml"), plan).expect("write");
        let outcome = cairn(&study.path, &["check", "plan.yaml"]);
        assert_eq!(outcome.code, 0, "{}", outcome.stderr);
        assert!(
            outcome.stdout.starts_with("note: plan.yaml:"),
            "the note names where: {}",
            outcome.stdout
        );
        assert!(
            outcome
                .stdout
                .contains("independent or positively dependent"),
            "{}",
            outcome.stdout
        );
    }
    // Holm assumes nothing of the kind: no note.
    let study = Scratch::new("note-holm");
    copy_tree(&root().join("tests/cases/base"), &study.path);
    let plan = std::fs::read_to_string(study.path.join("plan.yaml")).expect("plan")
        + "multiplicity:\n  procedure: holm\n  hypotheses:\n    - {id: H1, analysis: primary, contrast: high-vs-placebo}\n    - {id: H2, analysis: primary, contrast: low-vs-placebo}\n";
    std::fs::write(study.path.join("plan.yaml"), plan).expect("write");
    let outcome = cairn(&study.path, &["check", "plan.yaml"]);
    assert!(!outcome.stdout.contains("note:"), "{}", outcome.stdout);
}
