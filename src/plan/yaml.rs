//! A located YAML tree: the raw stage of plan parsing.
//!
//! The plan is read with yaml-rust2's event parser so that every node keeps
//! the line and column where it starts; the validator (`validate.rs`) walks
//! this tree and turns it into typed values, reporting every problem with its
//! position. Scalars keep whether they were quoted, so a plan that writes
//! `alpha: "0.05"` is told it gave text where a number belongs.
//!
//! This module knows YAML, not plans: it rejects what a plan must never
//! contain at the syntax level (duplicate keys, aliases, tags, several
//! documents, nesting deeper than [`MAX_NESTING`], more than [`MAX_ENTRIES`]
//! entries in one list or mapping) and nothing else.

use crate::error::{Error, ErrorKind, Location, Problem};
use std::collections::BTreeMap;
use yaml_rust2::parser::{Event, MarkedEventReceiver, Parser};
use yaml_rust2::scanner::{Marker, TScalarStyle};

/// The deepest nesting of lists and mappings a plan may have (stated in the
/// README). A real plan nests about five levels; the limit keeps the tree, and
/// every recursive walk over it (validation, comparison, dropping), far from
/// the end of the stack however the input is written.
pub const MAX_NESTING: usize = 64;

/// The most entries in one list or mapping of a plan (stated in the README). It
/// bounds, among others, the levels a plan can declare for one factor, and the
/// work that validation does per list.
pub const MAX_ENTRIES: usize = 10_000;

/// A YAML node with its 1-based position.
#[derive(Debug, Clone, PartialEq)]
pub struct Node {
    pub line: usize,
    pub column: usize,
    pub value: NodeValue,
}

#[derive(Debug, Clone, PartialEq)]
pub enum NodeValue {
    /// A scalar: its text and whether it was quoted or a block scalar
    /// (quoted scalars are always text, never numbers or booleans).
    Scalar {
        text: String,
        quoted: bool,
    },
    Sequence(Vec<Node>),
    /// Key–value pairs in file order; keys are scalars (checked on reading).
    Mapping(Vec<(Node, Node)>),
}

impl Node {
    /// A short description of the node's type for messages ("a list", "text \"x\"").
    pub fn describe(&self) -> String {
        match &self.value {
            NodeValue::Scalar { text, quoted } => {
                if !quoted && is_null(text) {
                    "nothing (null)".to_string()
                } else {
                    format!("\"{}\"", shorten(text))
                }
            }
            NodeValue::Sequence(_) => "a list".to_string(),
            NodeValue::Mapping(_) => "a mapping".to_string(),
        }
    }

    pub fn as_scalar(&self) -> Option<(&str, bool)> {
        match &self.value {
            NodeValue::Scalar { text, quoted } => Some((text.as_str(), *quoted)),
            _ => None,
        }
    }

    pub fn is_null(&self) -> bool {
        matches!(&self.value, NodeValue::Scalar { text, quoted: false } if is_null(text))
    }
}

/// YAML 1.2 core-schema null spellings.
fn is_null(text: &str) -> bool {
    matches!(text, "" | "~" | "null" | "Null" | "NULL")
}

fn shorten(text: &str) -> String {
    const LIMIT: usize = 60;
    if text.chars().count() <= LIMIT {
        text.to_string()
    } else {
        let head: String = text.chars().take(LIMIT).collect();
        format!("{head}…")
    }
}

/// Parse YAML text into a located tree. `file` names the file in errors.
pub fn parse(text: &str, file: &str) -> Result<Node, Error> {
    if let Some((line, column)) = find_tab_indentation(text) {
        return Err(Error::one(
            Problem::new(
                ErrorKind::PlanSyntax,
                "a tab is used for indentation; YAML allows only spaces",
            )
            .at(Location {
                file: file.to_string(),
                line: Some(line),
                column: Some(column),
                path: None,
            }),
        ));
    }
    let mut builder = TreeBuilder {
        file: file.to_string(),
        stack: Vec::new(),
        root: None,
        problems: Vec::new(),
        documents: 0,
        stopped: false,
    };
    let mut parser = Parser::new_from_str(text);
    // The events are pulled one by one here rather than through `Parser::load`,
    // which recurses once per nesting level and so overflows the stack on a few
    // thousand nested block mappings (found with a hand-made input of 1 000
    // levels). Pulling also stops the scan as soon as a limit is passed.
    let loaded = loop {
        match parser.next_token() {
            Ok((event, marker)) => {
                let end = event == Event::StreamEnd;
                builder.on_event(event, marker);
                if end || builder.stopped {
                    break Ok(());
                }
            }
            Err(scan_error) => break Err(scan_error),
        }
    };
    if builder.stopped {
        // A limit was passed; it comes first in the file, before any later
        // syntax error (such as the parser's own, deeper, recursion limit).
        return Err(Error {
            problems: builder.problems,
        });
    }
    if let Err(scan_error) = loaded {
        let marker = scan_error.marker();
        if scan_error.info().contains("recursion limit") {
            // yaml-rust2 reads ahead over a run of opening brackets before it
            // emits their events, so nesting deeper than its own bound (256
            // flow levels) stops in its scanner before the builder sees level
            // 65. It is the same limit to the user.
            return Err(Error::one(nesting_limit().at(location_of(file, marker))));
        }
        return Err(Error::one(
            Problem::new(
                ErrorKind::PlanSyntax,
                format!("malformed YAML: {}", scan_error.info()),
            )
            .at(location_of(file, marker)),
        ));
    }
    if !builder.problems.is_empty() {
        return Err(Error {
            problems: builder.problems,
        });
    }
    builder.root.ok_or_else(|| {
        Error::one(
            Problem::new(ErrorKind::PlanSyntax, "the file is empty; expected a plan")
                .at(Location::file(file)),
        )
    })
}

fn nesting_limit() -> Problem {
    Problem::new(
        ErrorKind::Limit,
        format!(
            "lists and mappings are nested more than {MAX_NESTING} levels deep; a plan may nest at most {MAX_NESTING}"
        ),
    )
}

/// The first line whose indentation contains a tab, as (line, column).
fn find_tab_indentation(text: &str) -> Option<(usize, usize)> {
    for (index, line) in text.lines().enumerate() {
        for (position, character) in line.chars().enumerate() {
            match character {
                ' ' => continue,
                '\t' => return Some((index + 1, position + 1)),
                _ => break,
            }
        }
    }
    None
}

fn location_of(file: &str, marker: &Marker) -> Location {
    Location {
        file: file.to_string(),
        line: Some(marker.line()),
        column: Some(marker.col() + 1),
        path: None,
    }
}

enum Open {
    Sequence {
        start: Marker,
        items: Vec<Node>,
    },
    /// `first_line` maps each scalar key's text to the line where it first
    /// appears, so that a repeated key is found without scanning every earlier one.
    Mapping {
        start: Marker,
        pairs: Vec<(Node, Node)>,
        pending_key: Option<Node>,
        first_line: BTreeMap<String, usize>,
    },
}

struct TreeBuilder {
    file: String,
    stack: Vec<Open>,
    root: Option<Node>,
    problems: Vec<Problem>,
    documents: usize,
    /// Set once a limit is passed (nesting or entries): the problem is recorded
    /// and every later event is ignored, so no larger tree is ever built.
    stopped: bool,
}

impl TreeBuilder {
    fn problem(&mut self, marker: Marker, message: String) {
        self.problems.push(
            Problem::new(ErrorKind::PlanSyntax, message).at(location_of(&self.file, &marker)),
        );
    }

    fn finish(&mut self, node: Node) {
        let entries = match self.stack.last() {
            Some(Open::Sequence { items, .. }) => items.len(),
            Some(Open::Mapping {
                pairs,
                pending_key: None,
                ..
            }) => pairs.len(),
            _ => 0,
        };
        if entries >= MAX_ENTRIES {
            // Checked before the entry is added, so no list or mapping ever holds more.
            self.stopped = true;
            self.problems.push(
                Problem::new(ErrorKind::Limit, format!("a list or mapping holds more than {MAX_ENTRIES} entries; a plan may have at most {MAX_ENTRIES} in one"))
                    .at(Location { file: self.file.clone(), line: Some(node.line), column: Some(node.column), path: None }),
            );
            return;
        }
        match self.stack.last_mut() {
            None => self.root = Some(node),
            Some(Open::Sequence { items, .. }) => items.push(node),
            Some(Open::Mapping {
                pairs,
                pending_key,
                first_line,
                ..
            }) => match pending_key.take() {
                None => *pending_key = Some(node),
                Some(key) => {
                    let duplicate = match &key.value {
                        NodeValue::Scalar { text, .. } => match first_line.get(text) {
                            Some(line) => Some((text.clone(), *line)),
                            None => {
                                first_line.insert(text.clone(), key.line);
                                None
                            }
                        },
                        _ => None,
                    };
                    let (line, column) = (key.line, key.column);
                    pairs.push((key, node));
                    if let Some((text, first_line)) = duplicate {
                        self.problems.push(
                            Problem::new(
                                ErrorKind::PlanSyntax,
                                format!("duplicate key \"{text}\"; it was already given on line {first_line}"),
                            )
                            .at(Location { file: self.file.clone(), line: Some(line), column: Some(column), path: None }),
                        );
                    }
                }
            },
        }
    }
}

impl MarkedEventReceiver for TreeBuilder {
    fn on_event(&mut self, event: Event, marker: Marker) {
        if self.stopped {
            return;
        }
        if matches!(event, Event::SequenceStart(..) | Event::MappingStart(..))
            && self.stack.len() >= MAX_NESTING
        {
            self.stopped = true;
            self.problems
                .push(nesting_limit().at(location_of(&self.file, &marker)));
            return;
        }
        match event {
            Event::DocumentStart => {
                self.documents += 1;
                if self.documents > 1 {
                    self.problem(
                        marker,
                        "a plan is one YAML document; found a second one".to_string(),
                    );
                }
            }
            Event::Alias(_) => {
                self.problem(
                    marker,
                    "aliases (*name) are not allowed in a plan; write the value out".to_string(),
                );
                self.finish(Node {
                    line: marker.line(),
                    column: marker.col() + 1,
                    value: NodeValue::Scalar {
                        text: String::new(),
                        quoted: true,
                    },
                });
            }
            Event::Scalar(text, style, anchor, tag) => {
                if anchor != 0 {
                    self.problem(
                        marker,
                        "anchors (&name) are not allowed in a plan".to_string(),
                    );
                }
                if tag.is_some() {
                    self.problem(marker, "tags (!name) are not allowed in a plan".to_string());
                }
                let quoted = !matches!(style, TScalarStyle::Plain);
                self.finish(Node {
                    line: marker.line(),
                    column: marker.col() + 1,
                    value: NodeValue::Scalar { text, quoted },
                });
            }
            Event::SequenceStart(anchor, tag) => {
                if anchor != 0 || tag.is_some() {
                    self.problem(
                        marker,
                        "anchors and tags are not allowed in a plan".to_string(),
                    );
                }
                self.stack.push(Open::Sequence {
                    start: marker,
                    items: Vec::new(),
                });
            }
            Event::MappingStart(anchor, tag) => {
                if anchor != 0 || tag.is_some() {
                    self.problem(
                        marker,
                        "anchors and tags are not allowed in a plan".to_string(),
                    );
                }
                self.stack.push(Open::Mapping {
                    start: marker,
                    pairs: Vec::new(),
                    pending_key: None,
                    first_line: BTreeMap::new(),
                });
            }
            Event::SequenceEnd => {
                if let Some(Open::Sequence { start, items }) = self.stack.pop() {
                    self.finish(Node {
                        line: start.line(),
                        column: start.col() + 1,
                        value: NodeValue::Sequence(items),
                    });
                }
            }
            Event::MappingEnd => {
                if let Some(Open::Mapping { start, pairs, .. }) = self.stack.pop() {
                    self.finish(Node {
                        line: start.line(),
                        column: start.col() + 1,
                        value: NodeValue::Mapping(pairs),
                    });
                }
            }
            Event::Nothing | Event::StreamStart | Event::StreamEnd | Event::DocumentEnd => {}
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn positions_are_one_based_line_and_column() {
        let root = parse("a: 1\nb:\n  c: \"x\"\n", "p.yaml").expect("parses");
        let NodeValue::Mapping(pairs) = &root.value else {
            panic!("mapping expected")
        };
        let (key_b, value_b) = &pairs[1];
        assert_eq!((key_b.line, key_b.column), (2, 1));
        let NodeValue::Mapping(inner) = &value_b.value else {
            panic!("mapping expected")
        };
        assert_eq!((inner[0].1.line, inner[0].1.column), (3, 6));
        assert_eq!(inner[0].1.as_scalar(), Some(("x", true)));
    }

    #[test]
    fn duplicate_keys_are_located() {
        let error = parse("a: 1\nb: 2\na: 3\n", "p.yaml").unwrap_err();
        assert_eq!(error.kind(), ErrorKind::PlanSyntax);
        let location = error.problems[0].location.clone().expect("located");
        assert_eq!((location.line, location.column), (Some(3), Some(1)));
        assert!(error.problems[0].message.contains("line 1"));
    }

    #[test]
    fn tabs_in_indentation_are_rejected_with_position() {
        let error = parse("a:\n\tb: 1\n", "p.yaml").unwrap_err();
        let location = error.problems[0].location.clone().expect("located");
        assert_eq!((location.line, location.column), (Some(2), Some(1)));
    }

    #[test]
    fn nesting_beyond_the_limit_is_a_located_limit_error() {
        let within = format!("{}{}", "[".repeat(MAX_NESTING), "]".repeat(MAX_NESTING));
        assert!(parse(&within, "p.yaml").is_ok());
        let beyond = format!(
            "a:\n  b: {}{}\n",
            "[".repeat(MAX_NESTING + 1),
            "]".repeat(MAX_NESTING + 1)
        );
        let error = parse(&beyond, "p.yaml").unwrap_err();
        assert_eq!(error.kind(), ErrorKind::Limit);
        let location = error.problems[0].location.clone().expect("located");
        assert_eq!(location.line, Some(2));
    }

    #[test]
    fn lists_beyond_the_entry_limit_are_a_located_limit_error() {
        let items = |count: usize| {
            (0..count)
                .map(|index| format!("L{index}"))
                .collect::<Vec<_>>()
                .join(", ")
        };
        assert!(parse(&format!("levels: [{}]\n", items(MAX_ENTRIES)), "p.yaml").is_ok());
        let error =
            parse(&format!("levels: [{}]\n", items(MAX_ENTRIES + 1)), "p.yaml").unwrap_err();
        assert_eq!(error.kind(), ErrorKind::Limit);
        assert_eq!(error.problems.len(), 1);
        let keys = (0..=MAX_ENTRIES)
            .map(|index| format!("k{index}: 1"))
            .collect::<Vec<_>>()
            .join("\n");
        assert_eq!(parse(&keys, "p.yaml").unwrap_err().kind(), ErrorKind::Limit);
    }

    #[test]
    fn malformed_yaml_is_a_located_syntax_error() {
        let error = parse("a: [1, 2\nb: 3\n", "p.yaml").unwrap_err();
        assert_eq!(error.kind(), ErrorKind::PlanSyntax);
        assert!(
            error.problems[0]
                .location
                .as_ref()
                .and_then(|l| l.line)
                .is_some()
        );
    }
}
