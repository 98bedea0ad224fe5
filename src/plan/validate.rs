//! From a located YAML tree to a typed [`Plan`], collecting every problem.
//!
//! The walk is strict: a key the schema does not know is an error (with the
//! closest known key as a hint), so is a value of the wrong type, a missing
//! required key, and a name that refers to nothing (an arm, a variable, a
//! population). Each problem carries the file, line, column and YAML path.
//! Validation continues past a problem wherever it can, so one run of
//! `cairn check` lists everything that needs fixing.
//!
//! The key-by-key schema is documented in plans/README.md; keep the two in step.

use super::yaml::{Node, NodeValue};
use super::*;
use crate::error::{Error, ErrorKind, Location, Problem, did_you_mean};

pub(super) fn validate(root: &Node, file: &str) -> Result<Plan, Error> {
    let mut reader = Reader {
        file,
        problems: Vec::new(),
    };
    let plan = read_plan(&mut reader, root);
    match plan {
        Some(plan) if reader.problems.is_empty() => Ok(plan),
        _ => {
            if reader.problems.is_empty() {
                return Err(Error::internal(
                    "plan validation failed without naming a problem",
                ));
            }
            Err(Error {
                problems: reader.problems,
            })
        }
    }
}

/// Walks nodes and records problems; every method returns `None` after
/// recording why, so callers can carry on with the rest of the plan.
struct Reader<'f> {
    file: &'f str,
    problems: Vec<Problem>,
}

/// The fields of one YAML mapping that passed the key check.
struct Fields<'n> {
    node: &'n Node,
    path: String,
    pairs: Vec<(&'n str, &'n Node)>,
}

impl<'n> Fields<'n> {
    fn get(&self, key: &str) -> Option<&'n Node> {
        self.pairs
            .iter()
            .find(|(name, _)| *name == key)
            .map(|(_, value)| *value)
            .filter(|value| !value.is_null())
    }

    fn child(&self, key: &str) -> String {
        join_path(&self.path, key)
    }
}

fn join_path(path: &str, key: &str) -> String {
    if path.is_empty() {
        key.to_string()
    } else {
        format!("{path}.{key}")
    }
}

impl<'f> Reader<'f> {
    fn location(&self, node: &Node, path: &str) -> Location {
        Location {
            file: self.file.to_string(),
            line: Some(node.line),
            column: Some(node.column),
            path: if path.is_empty() {
                None
            } else {
                Some(path.to_string())
            },
        }
    }

    fn report(&mut self, kind: ErrorKind, node: &Node, path: &str, message: String) {
        let location = self.location(node, path);
        self.problems.push(Problem::new(kind, message).at(location));
    }

    fn report_with_hint(
        &mut self,
        kind: ErrorKind,
        node: &Node,
        path: &str,
        message: String,
        hint: Option<String>,
    ) {
        let location = self.location(node, path);
        let mut problem = Problem::new(kind, message).at(location);
        problem.hint = hint;
        self.problems.push(problem);
    }

    /// Check that `node` is a mapping whose keys are all in `allowed` and that
    /// every key in `required` is present (and not null).
    fn mapping<'n>(
        &mut self,
        node: &'n Node,
        path: &str,
        allowed: &[&str],
        required: &[&str],
    ) -> Option<Fields<'n>> {
        let NodeValue::Mapping(pairs) = &node.value else {
            self.report(
                ErrorKind::PlanSchema,
                node,
                path,
                format!(
                    "expected a mapping of keys to values; found {}",
                    node.describe()
                ),
            );
            return None;
        };
        let mut fields = Fields {
            node,
            path: path.to_string(),
            pairs: Vec::new(),
        };
        for (key, value) in pairs {
            let Some((name, _)) = key.as_scalar() else {
                self.report(
                    ErrorKind::PlanSchema,
                    key,
                    path,
                    "a key must be plain text".to_string(),
                );
                continue;
            };
            if allowed.contains(&name) {
                fields.pairs.push((name, value));
            } else {
                let hint = did_you_mean(name, allowed.iter().copied())
                    .map(|known| format!("did you mean \"{known}\"?"));
                let expected = allowed.join(", ");
                self.report_with_hint(
                    ErrorKind::PlanSchema,
                    key,
                    &join_path(path, name),
                    format!("unknown key \"{name}\"; expected one of: {expected}"),
                    hint,
                );
            }
        }
        for key in required {
            if fields.get(key).is_none() {
                self.report(
                    ErrorKind::PlanSchema,
                    node,
                    path,
                    format!("missing required key \"{key}\""),
                );
            }
        }
        Some(fields)
    }

    /// A mapping whose keys are names chosen by the user (variables, populations).
    fn named_entries<'n>(
        &mut self,
        node: &'n Node,
        path: &str,
    ) -> Vec<(&'n str, &'n Node, &'n Node)> {
        let NodeValue::Mapping(pairs) = &node.value else {
            self.report(
                ErrorKind::PlanSchema,
                node,
                path,
                format!(
                    "expected a mapping of names to definitions; found {}",
                    node.describe()
                ),
            );
            return Vec::new();
        };
        let mut entries = Vec::new();
        for (key, value) in pairs {
            match key.as_scalar() {
                Some((name, _)) if !name.trim().is_empty() => entries.push((name, key, value)),
                _ => self.report(
                    ErrorKind::PlanSchema,
                    key,
                    path,
                    "a name must be non-empty text".to_string(),
                ),
            }
        }
        entries
    }

    fn text(&mut self, node: &Node, path: &str) -> Option<String> {
        match node.as_scalar() {
            Some((text, _)) if !node.is_null() && !text.trim().is_empty() => Some(text.to_string()),
            _ => {
                self.report(
                    ErrorKind::PlanSchema,
                    node,
                    path,
                    format!("expected non-empty text; found {}", node.describe()),
                );
                None
            }
        }
    }

    /// A name (identifier) chosen by the user: letters, digits, `-`, `_`, `.`.
    fn identifier(&mut self, node: &Node, path: &str) -> Option<String> {
        let text = self.text(node, path)?;
        if text
            .chars()
            .all(|character| character.is_alphanumeric() || matches!(character, '-' | '_' | '.'))
        {
            Some(text)
        } else {
            self.report(
                ErrorKind::PlanSchema,
                node,
                path,
                format!(
                    "\"{text}\" is not a valid name; use letters, digits, \"-\", \"_\" or \".\""
                ),
            );
            None
        }
    }

    fn number(&mut self, node: &Node, path: &str) -> Option<f64> {
        if let Some((text, false)) = node.as_scalar()
            && let Ok(value) = text.parse::<f64>()
            && value.is_finite()
            && looks_numeric(text)
        {
            return Some(value);
        }
        self.report(
            ErrorKind::PlanSchema,
            node,
            path,
            format!("expected a number; found {}", node.describe()),
        );
        None
    }

    fn whole_number(&mut self, node: &Node, path: &str) -> Option<u64> {
        if let Some((text, false)) = node.as_scalar()
            && let Ok(value) = text.parse::<u64>()
        {
            return Some(value);
        }
        self.report(
            ErrorKind::PlanSchema,
            node,
            path,
            format!("expected a whole number; found {}", node.describe()),
        );
        None
    }

    fn list<'n>(&mut self, node: &'n Node, path: &str) -> Option<&'n [Node]> {
        match &node.value {
            NodeValue::Sequence(items) => Some(items),
            _ => {
                self.report(
                    ErrorKind::PlanSchema,
                    node,
                    path,
                    format!("expected a list; found {}", node.describe()),
                );
                None
            }
        }
    }

    /// A list of texts with no repeats; a single text is not accepted as a list
    /// so that `covariates: AGE` is caught (it should be `[AGE]`).
    fn text_list(&mut self, node: &Node, path: &str) -> Option<Vec<(String, Node)>> {
        let items = self.list(node, path)?;
        let mut values: Vec<(String, Node)> = Vec::new();
        // A set, not a scan of `values`: a list may hold thousands of levels.
        let mut seen: std::collections::BTreeSet<String> = std::collections::BTreeSet::new();
        let mut complete = true;
        for (index, item) in items.iter().enumerate() {
            let item_path = format!("{path}[{index}]");
            match self.text(item, &item_path) {
                Some(text) => {
                    if !seen.insert(text.clone()) {
                        self.report(
                            ErrorKind::PlanSchema,
                            item,
                            &item_path,
                            format!("\"{text}\" is listed twice"),
                        );
                        complete = false;
                    } else {
                        values.push((text, item.clone()));
                    }
                }
                None => complete = false,
            }
        }
        complete.then_some(values)
    }

    fn choice<T: Copy>(&mut self, node: &Node, path: &str, options: &[(&str, T)]) -> Option<T> {
        let text = self.text(node, path)?;
        if let Some((_, value)) = options.iter().find(|(name, _)| *name == text) {
            return Some(*value);
        }
        let names: Vec<&str> = options.iter().map(|(name, _)| *name).collect();
        let hint = did_you_mean(&text, names.iter().copied())
            .map(|known| format!("did you mean \"{known}\"?"));
        self.report_with_hint(
            ErrorKind::PlanSchema,
            node,
            path,
            format!(
                "\"{text}\" is not allowed here; expected one of: {}",
                names.join(", ")
            ),
            hint,
        );
        None
    }

    /// Resolve a name against a list of known names; a miss is a dangling reference.
    fn reference(&mut self, node: &Node, path: &str, what: &str, known: &[&str]) -> Option<usize> {
        let name = self.text(node, path)?;
        if let Some(index) = known.iter().position(|candidate| *candidate == name) {
            return Some(index);
        }
        let hint = did_you_mean(&name, known.iter().copied())
            .map(|candidate| format!("did you mean \"{candidate}\"?"));
        let listing = if known.is_empty() {
            "none are declared".to_string()
        } else {
            format!("declared: {}", known.join(", "))
        };
        self.report_with_hint(
            ErrorKind::PlanReference,
            node,
            path,
            format!("no {what} named \"{name}\" ({listing})"),
            hint,
        );
        None
    }
}

/// Plain scalars like `.inf`, `nan`, `0x10` or `1_000` parse in some readers but
/// are not numbers a plan should contain; accept ordinary decimal notation only.
fn looks_numeric(text: &str) -> bool {
    let body = text.strip_prefix(['-', '+']).unwrap_or(text);
    !body.is_empty()
        && body
            .chars()
            .next()
            .is_some_and(|first| first.is_ascii_digit() || first == '.')
        && body.chars().all(|character| {
            character.is_ascii_digit() || matches!(character, '.' | 'e' | 'E' | '-' | '+')
        })
}

const TOP_KEYS: &[&str] = &[
    "cairn-plan",
    "study",
    "data",
    "variables",
    "populations",
    "analyses",
    "multiplicity",
];
const REQUIRED_TOP_KEYS: &[&str] = &[
    "cairn-plan",
    "study",
    "data",
    "variables",
    "populations",
    "analyses",
];

fn read_plan(reader: &mut Reader<'_>, root: &Node) -> Option<Plan> {
    // The version is checked first and alone: a plan of another schema
    // version would otherwise drown its one real problem in unknown keys.
    if let NodeValue::Mapping(pairs) = &root.value {
        let version = pairs
            .iter()
            .find(|(key, _)| key.as_scalar().map(|(text, _)| text) == Some("cairn-plan"));
        match version {
            None => {
                reader.report(
                    ErrorKind::PlanSchema,
                    root,
                    "",
                    format!(
                        "missing \"cairn-plan: {SCHEMA_VERSION}\" at the top; is this a cairn plan?"
                    ),
                );
                return None;
            }
            Some((_, value)) => {
                let version = reader.whole_number(value, "cairn-plan")?;
                if version != SCHEMA_VERSION {
                    let message = if version > SCHEMA_VERSION {
                        format!(
                            "this plan uses schema version {version}, newer than this cairn reads ({SCHEMA_VERSION}); use a newer cairn"
                        )
                    } else {
                        format!(
                            "schema version {version} is not supported; this cairn reads version {SCHEMA_VERSION}"
                        )
                    };
                    reader.report(ErrorKind::PlanSchema, value, "cairn-plan", message);
                    return None;
                }
            }
        }
    }
    let fields = reader.mapping(root, "", TOP_KEYS, REQUIRED_TOP_KEYS)?;
    let study = fields
        .get("study")
        .and_then(|node| read_study(reader, node, &fields.child("study")));
    let variables = fields
        .get("variables")
        .map(|node| read_variables(reader, node, "variables"))
        .unwrap_or_default();
    let data = fields
        .get("data")
        .and_then(|node| read_data(reader, node, "data", &variables));
    let populations = fields
        .get("populations")
        .map(|node| read_populations(reader, node, "populations", &variables))
        .unwrap_or_default();
    let analyses = match fields.get("analyses") {
        Some(node) => read_analyses(
            reader,
            node,
            "analyses",
            study.as_ref(),
            data.as_ref(),
            &variables,
            &populations,
        ),
        None => Vec::new(),
    };
    let mut notes = Vec::new();
    let multiplicity = match (fields.get("multiplicity"), &study) {
        (Some(node), Some(study)) => {
            read_multiplicity(reader, node, "multiplicity", study, &analyses, &mut notes)
        }
        _ => None,
    };
    Some(Plan {
        study: study?,
        data: data?,
        variables,
        populations,
        analyses,
        multiplicity,
        notes,
    })
}

fn read_multiplicity(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    study: &Study,
    analyses: &[Analysis],
    notes: &mut Vec<Problem>,
) -> Option<MultiplicitySpec> {
    use crate::multiplicity::{Procedure, Strategy};
    let fields = reader.mapping(
        node,
        path,
        &["procedure", "alpha", "hypotheses", "transitions"],
        &["procedure", "hypotheses"],
    )?;
    let procedure_node = fields.get("procedure");
    let procedure = procedure_node.and_then(|value| {
        reader.choice(
            value,
            &fields.child("procedure"),
            &[
                ("bonferroni", Procedure::Bonferroni),
                ("holm", Procedure::Holm),
                ("hochberg", Procedure::Hochberg),
                ("hommel", Procedure::Hommel),
                ("fixed-sequence", Procedure::FixedSequence),
                ("fallback", Procedure::Fallback),
                ("graphical", Procedure::Graphical),
            ],
        )
    });
    if let (Some(procedure @ (Procedure::Hochberg | Procedure::Hommel)), Some(value)) =
        (procedure, procedure_node)
    {
        let name = if procedure == Procedure::Hochberg {
            "Hochberg"
        } else {
            "Hommel"
        };
        notes.push(
            Problem::new(
                ErrorKind::PlanSchema,
                format!(
                    "the {name} procedure controls the familywise error rate only when the test statistics are independent or positively dependent; \
                     make sure that holds for this family (common practice; see the 2022 FDA guidance on multiple endpoints)"
                ),
            )
            .at(reader.location(value, &fields.child("procedure"))),
        );
    }
    let alpha = match fields.get("alpha") {
        None => Some(study.alpha),
        Some(value) => match reader.number(value, &fields.child("alpha")) {
            Some(alpha) if alpha > 0.0 && alpha <= study.alpha => Some(alpha),
            Some(alpha) => {
                reader.report(
                    ErrorKind::PlanSchema,
                    value,
                    &fields.child("alpha"),
                    format!("the family's alpha must lie above 0 and at most the study's alpha ({}); found {alpha}", study.alpha),
                );
                None
            }
            None => None,
        },
    };

    // Hypotheses: a list, in testing order.
    let mut hypotheses: Vec<HypothesisSpec> = Vec::new();
    let mut weight_given: Vec<bool> = Vec::new();
    let mut complete = true;
    let hypotheses_node = fields.get("hypotheses");
    let analysis_ids: Vec<&str> = analyses
        .iter()
        .map(|analysis| analysis.id.as_str())
        .collect();
    if let Some(list_node) = hypotheses_node {
        if let Some(items) = reader.list(list_node, &fields.child("hypotheses")) {
            if items.is_empty() {
                reader.report(
                    ErrorKind::PlanSchema,
                    list_node,
                    &fields.child("hypotheses"),
                    "a family needs at least one hypothesis".to_string(),
                );
                complete = false;
            }
            // The graphical procedure holds an m × m matrix of transitions and the
            // closed-testing procedures grow faster still, so the family is bounded.
            let items = if items.len() > limits::MAX_HYPOTHESES {
                reader.report(
                    ErrorKind::Limit,
                    list_node,
                    &fields.child("hypotheses"),
                    format!(
                        "the family has {} hypotheses; cairn tests at most {} together",
                        items.len(),
                        limits::MAX_HYPOTHESES
                    ),
                );
                complete = false;
                &items[..0]
            } else {
                items
            };
            for (index, item) in items.iter().enumerate() {
                let item_path = format!("{}[{index}]", fields.child("hypotheses"));
                let Some(entry) = reader.mapping(
                    item,
                    &item_path,
                    &["id", "label", "analysis", "contrast", "weight"],
                    &["id", "analysis", "contrast"],
                ) else {
                    complete = false;
                    continue;
                };
                let id = entry
                    .get("id")
                    .and_then(|value| reader.identifier(value, &entry.child("id")));
                let label = entry
                    .get("label")
                    .and_then(|value| reader.text(value, &entry.child("label")));
                let analysis = entry.get("analysis").and_then(|value| {
                    reader.reference(value, &entry.child("analysis"), "analysis", &analysis_ids)
                });
                let contrast = match (analysis, entry.get("contrast")) {
                    (Some(analysis), Some(value)) => {
                        let contrast_ids: Vec<&str> = analyses[analysis]
                            .contrasts
                            .iter()
                            .map(|contrast| contrast.id.as_str())
                            .collect();
                        reader.reference(
                            value,
                            &entry.child("contrast"),
                            &format!("contrast of analysis \"{}\"", analyses[analysis].id),
                            &contrast_ids,
                        )
                    }
                    _ => None,
                };
                let weight = match entry.get("weight") {
                    None => Some(None),
                    Some(value) => {
                        match reader.number(value, &entry.child("weight")) {
                            Some(weight) if (0.0..=1.0).contains(&weight) => Some(Some(weight)),
                            Some(weight) => {
                                reader.report(ErrorKind::PlanSchema, value, &entry.child("weight"), format!("a weight is a share of alpha between 0 and 1; found {weight}"));
                                None
                            }
                            None => None,
                        }
                    }
                };
                if let Some(id) = &id
                    && hypotheses.iter().any(|existing| &existing.id == id)
                {
                    reader.report(
                        ErrorKind::PlanSchema,
                        item,
                        &item_path,
                        format!("hypothesis id \"{id}\" is used twice"),
                    );
                    complete = false;
                }
                match (id, analysis, contrast, weight) {
                    (Some(id), Some(analysis), Some(contrast), Some(weight)) => {
                        weight_given.push(weight.is_some());
                        hypotheses.push(HypothesisSpec {
                            id,
                            label,
                            analysis,
                            contrast,
                            weight: weight.unwrap_or(0.0),
                        });
                    }
                    _ => complete = false,
                }
            }
        } else {
            complete = false;
        }
    }
    let procedure = procedure?;
    let alpha = alpha?;
    if !complete {
        return None;
    }
    let hypotheses_node = hypotheses_node?;
    let m = hypotheses.len();
    let any_weight = weight_given.iter().any(|given| *given);
    let all_weights = weight_given.iter().all(|given| *given);
    let weighted = matches!(
        procedure,
        Procedure::Bonferroni | Procedure::Holm | Procedure::Fallback | Procedure::Graphical
    );
    if any_weight && !weighted {
        reader.report(
            ErrorKind::PlanSchema,
            hypotheses_node,
            &fields.child("hypotheses"),
            format!(
                "the {} procedure takes no weights; remove them",
                procedure.name()
            ),
        );
        return None;
    }
    if any_weight && !all_weights {
        reader.report(
            ErrorKind::PlanSchema,
            hypotheses_node,
            &fields.child("hypotheses"),
            "give a weight to every hypothesis or to none".to_string(),
        );
        return None;
    }
    if procedure == Procedure::Graphical && !all_weights {
        reader.report(
            ErrorKind::PlanSchema,
            hypotheses_node,
            &fields.child("hypotheses"),
            "the graphical procedure needs an initial weight for every hypothesis".to_string(),
        );
        return None;
    }
    let total: f64 = hypotheses.iter().map(|hypothesis| hypothesis.weight).sum();
    if any_weight && total > 1.0 + crate::multiplicity::SUM_TOLERANCE {
        reader.report(
            ErrorKind::PlanSchema,
            hypotheses_node,
            &fields.child("hypotheses"),
            format!("the weights sum to {total}, above 1"),
        );
        return None;
    }

    // Transitions: graphical only; a mapping from hypothesis to {hypothesis: weight}.
    let mut transitions = vec![vec![0.0; m]; m];
    let ids: Vec<&str> = hypotheses
        .iter()
        .map(|hypothesis| hypothesis.id.as_str())
        .collect();
    match (procedure, fields.get("transitions")) {
        (Procedure::Graphical, None) => {
            reader.report(
                ErrorKind::PlanSchema,
                node,
                path,
                "the graphical procedure needs \"transitions\" (use {} for none)".to_string(),
            );
            return None;
        }
        (Procedure::Graphical, Some(transitions_node)) => {
            let transitions_path = fields.child("transitions");
            let is_empty_flow_mapping =
                matches!(&transitions_node.value, NodeValue::Mapping(pairs) if pairs.is_empty());
            if !is_empty_flow_mapping {
                for (from_name, from_key, row_node) in
                    reader.named_entries(transitions_node, &transitions_path)
                {
                    let row_path = join_path(&transitions_path, from_name);
                    let Some(from) = reader.reference(from_key, &row_path, "hypothesis", &ids)
                    else {
                        complete = false;
                        continue;
                    };
                    let mut row_total = 0.0;
                    for (to_name, to_key, weight_node) in reader.named_entries(row_node, &row_path)
                    {
                        let edge_path = join_path(&row_path, to_name);
                        let Some(to) = reader.reference(to_key, &edge_path, "hypothesis", &ids)
                        else {
                            complete = false;
                            continue;
                        };
                        if to == from {
                            reader.report(ErrorKind::PlanSchema, to_key, &edge_path, format!("a hypothesis cannot pass weight to itself (\"{from_name}\" to \"{to_name}\")"));
                            complete = false;
                            continue;
                        }
                        match reader.number(weight_node, &edge_path) {
                            Some(weight) if (0.0..=1.0).contains(&weight) => {
                                transitions[from][to] = weight;
                                row_total += weight;
                            }
                            Some(weight) => {
                                reader.report(
                                    ErrorKind::PlanSchema,
                                    weight_node,
                                    &edge_path,
                                    format!(
                                        "a transition weight lies between 0 and 1; found {weight}"
                                    ),
                                );
                                complete = false;
                            }
                            None => complete = false,
                        }
                    }
                    if row_total > 1.0 + crate::multiplicity::SUM_TOLERANCE {
                        reader.report(
                            ErrorKind::PlanSchema,
                            row_node,
                            &row_path,
                            format!(
                                "the transitions out of \"{from_name}\" sum to {row_total}, above 1"
                            ),
                        );
                        complete = false;
                    }
                }
            }
        }
        (_, Some(transitions_node)) => {
            reader.report(
                ErrorKind::PlanSchema,
                transitions_node,
                &fields.child("transitions"),
                format!(
                    "transitions belong to the graphical procedure; the {} procedure takes none",
                    procedure.name()
                ),
            );
            return None;
        }
        (_, None) => {}
    }
    if !complete {
        return None;
    }
    let weights = if any_weight {
        hypotheses
            .iter()
            .map(|hypothesis| hypothesis.weight)
            .collect()
    } else {
        Vec::new()
    };
    let matrix = if procedure == Procedure::Graphical {
        transitions.clone()
    } else {
        Vec::new()
    };
    match Strategy::new(procedure, m, weights, matrix) {
        Ok(strategy) => {
            for (hypothesis, weight) in hypotheses.iter_mut().zip(strategy.weights()) {
                hypothesis.weight = *weight;
            }
            Some(MultiplicitySpec {
                procedure,
                alpha,
                hypotheses,
                strategy,
                transitions,
            })
        }
        Err(error) => {
            reader.report(
                ErrorKind::PlanSchema,
                node,
                path,
                format!("the strategy is not valid: {error}"),
            );
            None
        }
    }
}

fn read_study(reader: &mut Reader<'_>, node: &Node, path: &str) -> Option<Study> {
    let fields = reader.mapping(
        node,
        path,
        &["id", "title", "alpha", "sides"],
        &["id", "title", "alpha", "sides"],
    )?;
    let id = fields
        .get("id")
        .and_then(|value| reader.text(value, &fields.child("id")));
    let title = fields
        .get("title")
        .and_then(|value| reader.text(value, &fields.child("title")));
    let alpha = fields.get("alpha").and_then(|value| {
        let alpha = reader.number(value, &fields.child("alpha"))?;
        if alpha > 0.0 && alpha < 0.5 {
            Some(alpha)
        } else {
            reader.report(
                ErrorKind::PlanSchema,
                value,
                &fields.child("alpha"),
                format!("alpha must lie between 0 and 0.5; found {alpha}"),
            );
            None
        }
    });
    let sides = fields.get("sides").and_then(|value| {
        let count = reader.whole_number(value, &fields.child("sides"))?;
        match count {
            1 => Some(Sides::One),
            2 => Some(Sides::Two),
            _ => {
                reader.report(
                    ErrorKind::PlanSchema,
                    value,
                    &fields.child("sides"),
                    format!("sides must be 1 or 2; found {count}"),
                );
                None
            }
        }
    });
    Some(Study {
        id: id?,
        title: title?,
        alpha: alpha?,
        sides: sides?,
    })
}

fn read_variables(reader: &mut Reader<'_>, node: &Node, path: &str) -> Vec<Variable> {
    let mut variables = Vec::new();
    let entries = reader.named_entries(node, path);
    if entries.len() > limits::MAX_VARIABLES {
        reader.report(
            ErrorKind::Limit,
            node,
            path,
            format!(
                "the plan declares {} variables; cairn reads at most {}",
                entries.len(),
                limits::MAX_VARIABLES
            ),
        );
        // The definitions are still read (the YAML entry limit keeps them few
        // enough), so that references to them do not add misleading problems.
    }
    for (name, key_node, definition) in entries {
        let entry_path = join_path(path, name);
        if reader.identifier(key_node, &entry_path).is_none() {
            continue;
        }
        let Some(fields) = reader.mapping(
            definition,
            &entry_path,
            &["kind", "levels", "label", "range"],
            &["kind"],
        ) else {
            continue;
        };
        let range = fields.get("range").and_then(|value| {
            let items = reader.list(value, &fields.child("range"))?;
            if items.len() != 2 {
                reader.report(
                    ErrorKind::PlanSchema,
                    value,
                    &fields.child("range"),
                    format!("a range is [lowest, highest]; found {} values", items.len()),
                );
                return None;
            }
            let low = reader.number(&items[0], &format!("{}[0]", fields.child("range")))?;
            let high = reader.number(&items[1], &format!("{}[1]", fields.child("range")))?;
            if low > high {
                reader.report(
                    ErrorKind::PlanSchema,
                    value,
                    &fields.child("range"),
                    format!("the range's lowest value {low} is above its highest {high}"),
                );
                return None;
            }
            Some((low, high))
        });
        if let (Some(range_node), Some(kind_node)) = (fields.get("range"), fields.get("kind"))
            && !matches!(kind_node.as_scalar(), Some(("numeric" | "count", _)))
        {
            reader.report(
                ErrorKind::PlanSchema,
                range_node,
                &fields.child("range"),
                "a range belongs to numeric and count variables only".to_string(),
            );
            continue;
        }
        let label = fields
            .get("label")
            .and_then(|value| reader.text(value, &fields.child("label")));
        let levels = fields.get("levels").and_then(|value| {
            let levels = reader.text_list(value, &fields.child("levels"))?;
            if levels.is_empty() {
                reader.report(
                    ErrorKind::PlanSchema,
                    value,
                    &fields.child("levels"),
                    "a list of levels must not be empty".to_string(),
                );
                return None;
            }
            Some(levels.into_iter().map(|(text, _)| text).collect::<Vec<_>>())
        });
        #[derive(Clone, Copy)]
        enum Kind {
            Numeric,
            Count,
            Factor,
            Ordinal,
        }
        let kind_node = fields.get("kind");
        let kind = kind_node.and_then(|value| {
            reader.choice(
                value,
                &fields.child("kind"),
                &[
                    ("numeric", Kind::Numeric),
                    ("count", Kind::Count),
                    ("factor", Kind::Factor),
                    ("ordinal", Kind::Ordinal),
                ],
            )
        });
        let kind = match (kind, levels, fields.get("levels")) {
            (Some(Kind::Numeric), _, Some(levels_node))
            | (Some(Kind::Count), _, Some(levels_node)) => {
                reader.report(
                    ErrorKind::PlanSchema,
                    levels_node,
                    &fields.child("levels"),
                    "levels belong to factor and ordinal variables only".to_string(),
                );
                None
            }
            (Some(Kind::Numeric), _, None) => Some(VariableKind::Numeric),
            (Some(Kind::Count), _, None) => Some(VariableKind::Count),
            (Some(Kind::Factor), levels, _) => Some(VariableKind::Factor { levels }),
            (Some(Kind::Ordinal), Some(levels), _) => Some(VariableKind::Ordinal { levels }),
            (Some(Kind::Ordinal), None, None) => {
                reader.report(
                    ErrorKind::PlanSchema,
                    fields.node,
                    &entry_path,
                    "an ordinal variable needs its levels, lowest first".to_string(),
                );
                None
            }
            _ => None,
        };
        if let Some(kind) = kind {
            variables.push(Variable {
                name: name.to_string(),
                kind,
                label,
                range,
            });
        }
    }
    variables
}

fn read_data(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    variables: &[Variable],
) -> Option<DataSpec> {
    let fields = reader.mapping(
        node,
        path,
        &[
            "subjects",
            "key",
            "treatment",
            "missing",
            "unmatched-subjects",
        ],
        &["subjects", "key", "treatment"],
    )?;
    let subjects = fields
        .get("subjects")
        .and_then(|value| reader.data_path(value, &fields.child("subjects")));
    let key = fields
        .get("key")
        .and_then(|value| reader.text(value, &fields.child("key")));
    if let (Some(key), Some(key_node)) = (&key, fields.get("key"))
        && variables.iter().any(|variable| &variable.name == key)
    {
        reader.report(
            ErrorKind::PlanSchema,
            key_node,
            &fields.child("key"),
            format!("the subject key \"{key}\" must not also be declared under variables"),
        );
    }
    let treatment = fields
        .get("treatment")
        .and_then(|value| read_treatment(reader, value, &fields.child("treatment"), variables));
    let missing_codes = match fields.get("missing") {
        Some(value) => reader
            .text_list_allowing_empty(value, &fields.child("missing"))
            .unwrap_or_default(),
        None => vec![String::new()],
    };
    let unmatched = match fields.get("unmatched-subjects") {
        Some(value) => reader.choice(
            value,
            &fields.child("unmatched-subjects"),
            &[
                ("error", UnmatchedRule::Error),
                ("exclude", UnmatchedRule::Exclude),
            ],
        ),
        None => Some(UnmatchedRule::Error),
    };
    Some(DataSpec {
        subjects: subjects?,
        key: key?,
        treatment: treatment?,
        missing_codes,
        unmatched: unmatched?,
    })
}

impl Reader<'_> {
    /// A data file path: relative to the plan's folder and staying inside it,
    /// so that a plan cannot reach files its reviewers were not given.
    fn data_path(&mut self, node: &Node, path: &str) -> Option<String> {
        let text = self.text(node, path)?;
        let candidate = std::path::Path::new(&text);
        let escapes = candidate.is_absolute()
            || text.starts_with('/')
            || text.starts_with('\\')
            || candidate.components().any(|component| {
                matches!(
                    component,
                    std::path::Component::ParentDir | std::path::Component::Prefix(_)
                )
            });
        if escapes {
            self.report(
                ErrorKind::PlanSchema,
                node,
                path,
                format!("\"{text}\" leaves the study folder; give a path relative to the plan's folder, without \"..\""),
            );
            return None;
        }
        Some(text)
    }

    /// Missing-value codes may include the empty string, so they get their own reader.
    fn text_list_allowing_empty(&mut self, node: &Node, path: &str) -> Option<Vec<String>> {
        let items = self.list(node, path)?;
        let mut codes = Vec::new();
        for (index, item) in items.iter().enumerate() {
            match item.as_scalar() {
                Some((text, quoted)) if quoted || !item.is_null() => codes.push(text.to_string()),
                Some(_) => codes.push(String::new()),
                None => self.report(
                    ErrorKind::PlanSchema,
                    item,
                    &format!("{path}[{index}]"),
                    format!("expected text; found {}", item.describe()),
                ),
            }
        }
        Some(codes)
    }
}

fn read_treatment(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    variables: &[Variable],
) -> Option<TreatmentSpec> {
    let fields = reader.mapping(
        node,
        path,
        &["file", "column", "levels", "reference", "labels"],
        &["file", "column", "levels", "reference"],
    )?;
    let file = fields
        .get("file")
        .and_then(|value| reader.data_path(value, &fields.child("file")));
    let column = fields
        .get("column")
        .and_then(|value| reader.text(value, &fields.child("column")));
    if let (Some(column), Some(column_node)) = (&column, fields.get("column"))
        && variables.iter().any(|variable| &variable.name == column)
    {
        reader.report(
            ErrorKind::PlanSchema,
            column_node,
            &fields.child("column"),
            format!("the treatment column \"{column}\" must not also be declared under variables"),
        );
    }
    let levels = fields.get("levels").and_then(|value| {
        let levels = reader.text_list(value, &fields.child("levels"))?;
        if levels.len() < 2 {
            reader.report(
                ErrorKind::PlanSchema,
                value,
                &fields.child("levels"),
                format!("a trial needs at least two arms; found {}", levels.len()),
            );
            return None;
        }
        if levels.len() > limits::MAX_ARMS {
            reader.report(
                ErrorKind::Limit,
                value,
                &fields.child("levels"),
                format!(
                    "the plan has {} arms; cairn compares at most {}",
                    levels.len(),
                    limits::MAX_ARMS
                ),
            );
            return None;
        }
        Some(levels)
    });
    let level_names: Vec<String> = levels
        .iter()
        .flatten()
        .map(|(text, _)| text.clone())
        .collect();
    let known: Vec<&str> = level_names.iter().map(String::as_str).collect();
    let reference = match (fields.get("reference"), levels.is_some()) {
        (Some(value), true) => {
            reader.reference(value, &fields.child("reference"), "treatment arm", &known)
        }
        _ => None,
    };
    let mut labels: Vec<Option<String>> = vec![None; level_names.len()];
    if let Some(labels_node) = fields.get("labels") {
        for (code, key_node, label_node) in
            reader.named_entries(labels_node, &fields.child("labels"))
        {
            let label_path = join_path(&fields.child("labels"), code);
            if levels.is_some()
                && let Some(index) =
                    reader.reference(key_node, &label_path, "treatment arm", &known)
            {
                labels[index] = reader.text(label_node, &label_path);
            }
        }
    }
    let arms = level_names
        .iter()
        .zip(labels)
        .map(|(code, label)| Arm {
            code: code.clone(),
            label: label.unwrap_or_else(|| code.clone()),
        })
        .collect();
    levels?;
    Some(TreatmentSpec {
        file: file?,
        column: column?,
        arms,
        reference: reference?,
    })
}

fn read_populations(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    variables: &[Variable],
) -> Vec<Population> {
    let variable_names: Vec<&str> = variables
        .iter()
        .map(|variable| variable.name.as_str())
        .collect();
    let mut populations = Vec::new();
    for (id, key_node, definition) in reader.named_entries(node, path) {
        let entry_path = join_path(path, id);
        if reader.identifier(key_node, &entry_path).is_none() {
            continue;
        }
        let Some(fields) = reader.mapping(
            definition,
            &entry_path,
            &["flag", "equals", "in", "label"],
            &["flag"],
        ) else {
            continue;
        };
        let label = fields
            .get("label")
            .and_then(|value| reader.text(value, &fields.child("label")));
        let column = fields.get("flag").and_then(|value| {
            reader.reference(
                value,
                &fields.child("flag"),
                "declared variable",
                &variable_names,
            )
        });
        if let (Some(column), Some(flag_node)) = (column, fields.get("flag"))
            && !matches!(variables[column].kind, VariableKind::Factor { .. })
        {
            reader.report(
                ErrorKind::PlanSchema,
                flag_node,
                &fields.child("flag"),
                format!(
                    "a population flag must be a factor variable; \"{}\" is {}",
                    variables[column].name,
                    variables[column].kind.name()
                ),
            );
        }
        let values = match (fields.get("equals"), fields.get("in")) {
            (Some(equals), None) => reader
                .text(equals, &fields.child("equals"))
                .map(|value| vec![value]),
            (None, Some(set)) => reader
                .text_list(set, &fields.child("in"))
                .map(|values| values.into_iter().map(|(text, _)| text).collect()),
            (Some(_), Some(set)) => {
                reader.report(
                    ErrorKind::PlanSchema,
                    set,
                    &fields.child("in"),
                    "give either \"equals\" or \"in\", not both".to_string(),
                );
                None
            }
            (None, None) => {
                reader.report(
                    ErrorKind::PlanSchema,
                    definition,
                    &entry_path,
                    "a population needs \"equals: VALUE\" or \"in: [VALUES]\"".to_string(),
                );
                None
            }
        };
        if let (Some(column), Some(values)) = (column, &values)
            && let VariableKind::Factor {
                levels: Some(levels),
            } = &variables[column].kind
        {
            for value in values {
                if !levels.contains(value) {
                    reader.report(
                        ErrorKind::PlanReference,
                        definition,
                        &entry_path,
                        format!(
                            "\"{value}\" is not a level of \"{}\" (levels: {})",
                            variables[column].name,
                            levels.join(", ")
                        ),
                    );
                }
            }
        }
        if let (Some(column), Some(values)) = (column, values) {
            populations.push(Population {
                id: id.to_string(),
                label: label.unwrap_or_else(|| id.to_string()),
                column,
                values,
            });
        }
    }
    populations
}

const ANALYSIS_KEYS: &[&str] = &[
    "id",
    "title",
    "role",
    "endpoint",
    "population",
    "model",
    "covariates",
    "strata",
    "pool-small-strata",
    "contrasts",
    "confidence",
    "fallbacks",
    "checks",
    "check-level",
    "supportive",
    "max-excluded",
    "estimand",
];

fn read_analyses(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    study: Option<&Study>,
    data: Option<&DataSpec>,
    variables: &[Variable],
    populations: &[Population],
) -> Vec<Analysis> {
    let Some(items) = reader.list(node, path) else {
        return Vec::new();
    };
    if items.is_empty() {
        reader.report(
            ErrorKind::PlanSchema,
            node,
            path,
            "a plan needs at least one analysis".to_string(),
        );
    }
    if items.len() > limits::MAX_ANALYSES {
        reader.report(
            ErrorKind::Limit,
            node,
            path,
            format!(
                "the plan has {} analyses; cairn runs at most {} in one plan",
                items.len(),
                limits::MAX_ANALYSES
            ),
        );
        // The analyses are still read, as for the variables, so that the
        // multiplicity section's references to them do not add problems.
    }
    let mut analyses: Vec<Analysis> = Vec::new();
    for (index, item) in items.iter().enumerate() {
        let item_path = format!("{path}[{index}]");
        if let Some(analysis) = read_analysis(
            reader,
            item,
            &item_path,
            study,
            data,
            variables,
            populations,
        ) {
            if analyses.iter().any(|existing| existing.id == analysis.id) {
                reader.report(
                    ErrorKind::PlanSchema,
                    item,
                    &format!("{item_path}.id"),
                    format!("analysis id \"{}\" is used twice", analysis.id),
                );
            } else {
                analyses.push(analysis);
            }
        }
    }
    analyses
}

fn read_analysis(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    study: Option<&Study>,
    data: Option<&DataSpec>,
    variables: &[Variable],
    populations: &[Population],
) -> Option<Analysis> {
    let fields = reader.mapping(
        node,
        path,
        ANALYSIS_KEYS,
        &["id", "endpoint", "population", "model", "contrasts"],
    )?;
    let variable_names: Vec<&str> = variables
        .iter()
        .map(|variable| variable.name.as_str())
        .collect();
    let population_names: Vec<&str> = populations
        .iter()
        .map(|population| population.id.as_str())
        .collect();
    let id = fields
        .get("id")
        .and_then(|value| reader.identifier(value, &fields.child("id")));
    let title = fields
        .get("title")
        .and_then(|value| reader.text(value, &fields.child("title")));
    let role = match fields.get("role") {
        Some(value) => reader.choice(
            value,
            &fields.child("role"),
            &[
                ("primary", Role::Primary),
                ("key-secondary", Role::KeySecondary),
                ("secondary", Role::Secondary),
                ("sensitivity", Role::Sensitivity),
                ("supplementary", Role::Supplementary),
                ("exploratory", Role::Exploratory),
            ],
        ),
        None => Some(Role::Secondary),
    };
    let endpoint = fields
        .get("endpoint")
        .and_then(|value| read_endpoint(reader, value, &fields.child("endpoint"), variables));
    let population = fields.get("population").and_then(|value| {
        reader.reference(
            value,
            &fields.child("population"),
            "population",
            &population_names,
        )
    });
    let model = fields.get("model").and_then(|value| {
        read_model(
            reader,
            value,
            &fields.child("model"),
            endpoint.as_ref(),
            variables,
        )
    });
    let covariates = read_terms(
        reader,
        fields.get("covariates"),
        &fields.child("covariates"),
        variables,
        &variable_names,
        false,
    );
    let strata = read_terms(
        reader,
        fields.get("strata"),
        &fields.child("strata"),
        variables,
        &variable_names,
        true,
    );
    if let (Some(covariates), Some(strata)) = (&covariates, &strata) {
        for stratum in strata {
            if covariates.contains(stratum)
                && let Some(strata_node) = fields.get("strata")
            {
                reader.report(
                    ErrorKind::PlanSchema,
                    strata_node,
                    &fields.child("strata"),
                    format!(
                        "\"{}\" is listed both as a covariate and as a stratum",
                        variables[*stratum].name
                    ),
                );
            }
        }
    }
    if let (Some(endpoint), Some(covariates), Some(strata)) = (&endpoint, &covariates, &strata)
        && (covariates.contains(&endpoint.variable) || strata.contains(&endpoint.variable))
    {
        reader.report(
            ErrorKind::PlanSchema,
            node,
            path,
            "the endpoint cannot also be a covariate or stratum".to_string(),
        );
    }
    let pool_small_strata = match fields.get("pool-small-strata") {
        None => Some(None),
        Some(value) => read_pooling(
            reader,
            value,
            &fields.child("pool-small-strata"),
            strata.as_deref().unwrap_or(&[]),
            variables,
        )
        .map(Some),
    };
    // Contrasts name arms, so they are checked only when the arms are known;
    // the plan is rejected anyway when `data` has problems.
    let contrasts = match data {
        Some(data) => fields.get("contrasts").and_then(|value| {
            read_contrasts(reader, value, &fields.child("contrasts"), &data.treatment)
        }),
        None => None,
    };
    let default_confidence = match study {
        Some(Study {
            sides: Sides::One,
            alpha,
            ..
        }) => 1.0 - 2.0 * alpha,
        Some(Study {
            sides: Sides::Two,
            alpha,
            ..
        }) => 1.0 - alpha,
        None => 0.95,
    };
    let confidence_level = match fields.get("confidence") {
        None => Some(default_confidence),
        Some(value) => {
            let level = reader.number(value, &fields.child("confidence"));
            match level {
                Some(level) if level > 0.5 && level < 1.0 => Some(level),
                Some(level) => {
                    reader.report(
                        ErrorKind::PlanSchema,
                        value,
                        &fields.child("confidence"),
                        format!("a confidence level lies between 0.5 and 1; found {level}"),
                    );
                    None
                }
                None => None,
            }
        }
    };
    let has_strata = strata.as_ref().is_some_and(|strata| !strata.is_empty());
    let fallbacks = match (fields.get("fallbacks"), &model) {
        (None, _) => Some(Vec::new()),
        (Some(value), Some(model)) => {
            read_fallbacks(reader, value, &fields.child("fallbacks"), model)
        }
        (Some(_), None) => None,
    };
    let checks = match (fields.get("checks"), &model) {
        (None, _) => Some(Vec::new()),
        (Some(value), Some(model)) => {
            read_checks(reader, value, &fields.child("checks"), model, has_strata)
        }
        (Some(_), None) => None,
    };
    let check_level = match fields.get("check-level") {
        None => Some(0.05),
        Some(value) => match reader.number(value, &fields.child("check-level")) {
            Some(level) if level > 0.0 && level < 0.5 => Some(level),
            Some(level) => {
                reader.report(
                    ErrorKind::PlanSchema,
                    value,
                    &fields.child("check-level"),
                    format!("a check level lies between 0 and 0.5; found {level}"),
                );
                None
            }
            None => None,
        },
    };
    let supportive = match (fields.get("supportive"), &model, &endpoint) {
        (None, _, _) => Some(Vec::new()),
        (Some(value), Some(model), Some(endpoint)) => read_supportive(
            reader,
            value,
            &fields.child("supportive"),
            model,
            endpoint,
            variables,
            has_strata,
        ),
        _ => None,
    };
    let max_excluded = match fields.get("max-excluded") {
        None => Some(None),
        Some(value) => match reader.number(value, &fields.child("max-excluded")) {
            Some(share) if (0.0..=1.0).contains(&share) => Some(Some(share)),
            Some(share) => {
                reader.report(
                    ErrorKind::PlanSchema,
                    value,
                    &fields.child("max-excluded"),
                    format!("a share of the population lies between 0 and 1; found {share}"),
                );
                None
            }
            None => None,
        },
    };
    let estimand = match fields.get("estimand") {
        None => Some(None),
        Some(value) => read_estimand(reader, value, &fields.child("estimand")).map(Some),
    };
    let id = id?;
    Some(Analysis {
        title: title.unwrap_or_else(|| id.clone()),
        id,
        role: role?,
        endpoint: endpoint?,
        population: population?,
        model: model?,
        covariates: covariates?,
        strata: strata?,
        pool_small_strata: pool_small_strata?,
        contrasts: contrasts?,
        confidence_level: confidence_level?,
        fallbacks: fallbacks?,
        checks: checks?,
        check_level: check_level?,
        supportive: supportive?,
        max_excluded: max_excluded?,
        estimand: estimand?,
        origin: reader.location(node, path),
    })
}

fn read_endpoint(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    variables: &[Variable],
) -> Option<Endpoint> {
    let fields = reader.mapping(
        node,
        path,
        &["column", "kind", "higher-is", "event"],
        &["column", "kind"],
    )?;
    let names: Vec<&str> = variables
        .iter()
        .map(|variable| variable.name.as_str())
        .collect();
    let variable = fields.get("column").and_then(|value| {
        reader.reference(value, &fields.child("column"), "declared variable", &names)
    });
    let kind = fields.get("kind").and_then(|value| {
        reader.choice(
            value,
            &fields.child("kind"),
            &[
                ("continuous", EndpointKind::Continuous),
                ("binary", EndpointKind::Binary),
                ("count", EndpointKind::Count),
                ("ordinal", EndpointKind::Ordinal),
                ("nominal", EndpointKind::Nominal),
            ],
        )
    });
    let higher_is = fields.get("higher-is").and_then(|value| {
        reader.choice(
            value,
            &fields.child("higher-is"),
            &[("better", Direction::Better), ("worse", Direction::Worse)],
        )
    });
    let (Some(variable), Some(kind), Some(kind_node)) = (variable, kind, fields.get("kind")) else {
        return None;
    };
    // Unordered categories have no direction; every other endpoint must say which way is good.
    let higher_is = match (higher_is, fields.get("higher-is"), kind) {
        (None, None, EndpointKind::Nominal) => Some(Direction::Better),
        (None, None, _) => {
            reader.report(
                ErrorKind::PlanSchema,
                node,
                path,
                "missing required key \"higher-is\" (better or worse)".to_string(),
            );
            return None;
        }
        (_, Some(value), EndpointKind::Nominal) => {
            reader.report(
                ErrorKind::PlanSchema,
                value,
                &fields.child("higher-is"),
                "a nominal endpoint has no order, so \"higher-is\" does not apply".to_string(),
            );
            return None;
        }
        (higher_is, _, _) => higher_is,
    };
    let declared = &variables[variable].kind;
    let name = &variables[variable].name;
    let requirement = match kind {
        EndpointKind::Continuous => (!matches!(declared, VariableKind::Numeric | VariableKind::Count)).then_some("a numeric or count variable"),
        EndpointKind::Binary => (!matches!(declared, VariableKind::Factor { levels: Some(levels) } if levels.len() == 2))
            .then_some("a factor variable with exactly two declared levels"),
        EndpointKind::Count => (!matches!(declared, VariableKind::Count)).then_some("a count variable"),
        EndpointKind::Ordinal => (!matches!(declared, VariableKind::Ordinal { levels } if levels.len() >= 2)).then_some("an ordinal variable with at least two levels"),
        EndpointKind::Nominal => (!matches!(declared, VariableKind::Factor { levels: Some(levels) } if levels.len() >= 2))
            .then_some("a factor variable with declared levels"),
    };
    if let Some(requirement) = requirement {
        reader.report(
            ErrorKind::PlanSchema,
            kind_node,
            &fields.child("kind"),
            format!(
                "a {} endpoint needs {requirement}; \"{name}\" is declared {}",
                kind.name(),
                declared.name()
            ),
        );
        return None;
    }
    let event = match (kind, fields.get("event")) {
        (EndpointKind::Binary, Some(value)) => {
            let VariableKind::Factor {
                levels: Some(levels),
            } = declared
            else {
                return None;
            };
            let known: Vec<&str> = levels.iter().map(String::as_str).collect();
            Some(reader.reference(
                value,
                &fields.child("event"),
                &format!("level of \"{name}\""),
                &known,
            )?)
        }
        (EndpointKind::Binary, None) => {
            reader.report(
                ErrorKind::PlanSchema,
                node,
                path,
                "a binary endpoint needs \"event\": the level that counts as the event".to_string(),
            );
            return None;
        }
        (_, Some(value)) => {
            reader.report(
                ErrorKind::PlanSchema,
                value,
                &fields.child("event"),
                "\"event\" belongs to binary endpoints only".to_string(),
            );
            return None;
        }
        (_, None) => None,
    };
    Some(Endpoint {
        variable,
        kind,
        higher_is: higher_is?,
        event,
    })
}

fn read_model(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    endpoint: Option<&Endpoint>,
    variables: &[Variable],
) -> Option<ModelSpec> {
    use crate::models::glm::{Link, Method};
    use crate::models::ordinal::CumulativeLink;
    let fields = reader.mapping(
        node,
        path,
        &[
            "family",
            "link",
            "exposure",
            "method",
            "standard-errors",
            "intervals",
            "reference-category",
        ],
        &["family"],
    )?;
    #[derive(Clone, Copy, PartialEq)]
    enum Family {
        Linear,
        Glm(GlmFamily),
        Cumulative,
        Multinomial,
    }
    let family_node = fields.get("family")?;
    let family = reader.choice(
        family_node,
        &fields.child("family"),
        &[
            ("linear", Family::Linear),
            ("binomial", Family::Glm(GlmFamily::Binomial)),
            ("poisson", Family::Glm(GlmFamily::Poisson)),
            (
                "negative-binomial",
                Family::Glm(GlmFamily::NegativeBinomial),
            ),
            ("gamma", Family::Glm(GlmFamily::Gamma)),
            ("cumulative", Family::Cumulative),
            ("multinomial", Family::Multinomial),
        ],
    )?;
    let family_name = family_node
        .as_scalar()
        .map(|(text, _)| text.to_string())
        .unwrap_or_default();
    // Which keys each family takes; anything else is an error at the key.
    let allowed: &[&str] = match family {
        Family::Linear => &["family"],
        Family::Glm(GlmFamily::Binomial) => {
            &["family", "link", "method", "standard-errors", "intervals"]
        }
        Family::Glm(GlmFamily::Poisson | GlmFamily::NegativeBinomial) => {
            &["family", "link", "exposure", "standard-errors", "intervals"]
        }
        Family::Glm(GlmFamily::Gamma) => &["family", "link", "standard-errors", "intervals"],
        Family::Cumulative => &["family", "link"],
        Family::Multinomial => &["family", "reference-category"],
    };
    let mut complete = true;
    for (key, value) in &fields.pairs {
        if !allowed.contains(key) {
            reader.report(
                ErrorKind::PlanSchema,
                value,
                &fields.child(key),
                format!("\"{key}\" does not apply to the {family_name} family"),
            );
            complete = false;
        }
    }
    if let Some(endpoint) = endpoint {
        let fits = match family {
            Family::Linear => endpoint.kind == EndpointKind::Continuous,
            Family::Glm(GlmFamily::Binomial) => endpoint.kind == EndpointKind::Binary,
            Family::Glm(GlmFamily::Poisson | GlmFamily::NegativeBinomial) => {
                endpoint.kind == EndpointKind::Count
            }
            Family::Glm(GlmFamily::Gamma) => endpoint.kind == EndpointKind::Continuous,
            Family::Cumulative => endpoint.kind == EndpointKind::Ordinal,
            Family::Multinomial => endpoint.kind == EndpointKind::Nominal,
        };
        if !fits {
            reader.report(
                ErrorKind::PlanSchema,
                family_node,
                &fields.child("family"),
                format!(
                    "the {family_name} family does not fit a {} endpoint",
                    endpoint.kind.name()
                ),
            );
            return None;
        }
    }
    if !complete {
        return None;
    }
    match family {
        Family::Linear => Some(ModelSpec::Linear),
        Family::Cumulative => {
            let link = match fields.get("link") {
                None => CumulativeLink::Logit,
                Some(value) => reader.choice(
                    value,
                    &fields.child("link"),
                    &[
                        ("logit", CumulativeLink::Logit),
                        ("probit", CumulativeLink::Probit),
                        ("cloglog", CumulativeLink::ComplementaryLogLog),
                    ],
                )?,
            };
            Some(ModelSpec::Cumulative { link })
        }
        Family::Multinomial => {
            let endpoint = endpoint?;
            let VariableKind::Factor {
                levels: Some(levels),
            } = &variables[endpoint.variable].kind
            else {
                return None;
            };
            let known: Vec<&str> = levels.iter().map(String::as_str).collect();
            let reference_category = match fields.get("reference-category") {
                Some(value) => reader.reference(
                    value,
                    &fields.child("reference-category"),
                    "outcome category",
                    &known,
                )?,
                None => {
                    reader.report(
                        ErrorKind::PlanSchema,
                        node,
                        path,
                        "a multinomial model needs \"reference-category\": the outcome level the others are compared with".to_string(),
                    );
                    return None;
                }
            };
            Some(ModelSpec::Multinomial { reference_category })
        }
        Family::Glm(glm_family) => {
            let links: &[(&str, Link)] = match glm_family {
                GlmFamily::Binomial => &[
                    ("logit", Link::Logit),
                    ("probit", Link::Probit),
                    ("cloglog", Link::CLogLog),
                ],
                GlmFamily::Poisson | GlmFamily::NegativeBinomial => &[("log", Link::Log)],
                GlmFamily::Gamma => &[("log", Link::Log), ("inverse", Link::Inverse)],
            };
            let link = match fields.get("link") {
                None => links[0].1,
                Some(value) => reader.choice(value, &fields.child("link"), links)?,
            };
            let names: Vec<&str> = variables
                .iter()
                .map(|variable| variable.name.as_str())
                .collect();
            let exposure = match fields.get("exposure") {
                None => None,
                Some(value) => {
                    let index = reader.reference(
                        value,
                        &fields.child("exposure"),
                        "declared variable",
                        &names,
                    )?;
                    if !matches!(
                        variables[index].kind,
                        VariableKind::Numeric | VariableKind::Count
                    ) {
                        reader.report(
                            ErrorKind::PlanSchema,
                            value,
                            &fields.child("exposure"),
                            format!(
                                "an exposure must be a numeric variable; \"{}\" is {}",
                                variables[index].name,
                                variables[index].kind.name()
                            ),
                        );
                        return None;
                    }
                    Some(index)
                }
            };
            let method = match fields.get("method") {
                None => Method::MaximumLikelihood,
                Some(value) => reader.choice(
                    value,
                    &fields.child("method"),
                    &[
                        ("maximum-likelihood", Method::MaximumLikelihood),
                        ("firth", Method::Firth),
                    ],
                )?,
            };
            if method == Method::Firth && link != Link::Logit {
                reader.report(
                    ErrorKind::PlanSchema,
                    fields.get("method")?,
                    &fields.child("method"),
                    "Firth's penalised likelihood is available for the logit link only".to_string(),
                );
                return None;
            }
            let sandwich = match fields.get("standard-errors") {
                None => false,
                Some(value) => reader.choice(
                    value,
                    &fields.child("standard-errors"),
                    &[("model-based", false), ("sandwich", true)],
                )?,
            };
            let profile_intervals = match fields.get("intervals") {
                None => false,
                Some(value) => reader.choice(
                    value,
                    &fields.child("intervals"),
                    &[("wald", false), ("profile", true)],
                )?,
            };
            if profile_intervals && method == Method::Firth {
                reader.report(
                    ErrorKind::PlanSchema,
                    fields.get("intervals")?,
                    &fields.child("intervals"),
                    "profile-likelihood intervals are not available with Firth's method; use wald"
                        .to_string(),
                );
                return None;
            }
            Some(ModelSpec::Generalized(GlmSpec {
                family: glm_family,
                link,
                exposure,
                method,
                sandwich,
                profile_intervals,
            }))
        }
    }
}

fn read_fallbacks(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    model: &ModelSpec,
) -> Option<Vec<Fallback>> {
    use crate::models::glm::{Link, Method};
    let items = reader.list(node, path)?;
    let mut fallbacks = Vec::new();
    let mut complete = true;
    for (index, item) in items.iter().enumerate() {
        let item_path = format!("{path}[{index}]");
        let Some(fields) = reader.mapping(
            item,
            &item_path,
            &["when", "use", "above"],
            &["when", "use"],
        ) else {
            complete = false;
            continue;
        };
        let when = fields.get("when").and_then(|value| {
            reader.choice(
                value,
                &fields.child("when"),
                &[
                    ("separation", 0),
                    ("overdispersion", 1),
                    ("empty-category", 2),
                    ("non-proportional-odds", 3),
                ],
            )
        });
        let remedy = fields.get("use").and_then(|value| {
            reader.choice(
                value,
                &fields.child("use"),
                &[
                    ("firth", 0),
                    ("negative-binomial", 1),
                    ("merge-with-neighbour", 2),
                    ("partial-proportional-odds", 3),
                ],
            )
        });
        let (Some(when), Some(remedy)) = (when, remedy) else {
            complete = false;
            continue;
        };
        if let (Some(above), false) = (fields.get("above"), when == 1) {
            reader.report(
                ErrorKind::PlanSchema,
                above,
                &fields.child("above"),
                "\"above\" belongs to the overdispersion fallback only".to_string(),
            );
            complete = false;
            continue;
        }
        let fallback = match (when, remedy) {
            (0, 0) => match model {
                ModelSpec::Generalized(GlmSpec {
                    family: GlmFamily::Binomial,
                    link: Link::Logit,
                    method: Method::MaximumLikelihood,
                    ..
                }) => Some(Fallback::FirthOnSeparation),
                _ => {
                    reader.report(ErrorKind::PlanSchema, item, &item_path, "the Firth fallback applies to a binomial logit model fitted by maximum likelihood".to_string());
                    None
                }
            },
            (1, 1) => match (model, fields.get("above")) {
                (
                    ModelSpec::Generalized(GlmSpec {
                        family: GlmFamily::Poisson,
                        ..
                    }),
                    Some(value),
                ) => match reader.number(value, &fields.child("above")) {
                    Some(threshold) if threshold >= 1.0 => {
                        Some(Fallback::NegativeBinomialAbove(threshold))
                    }
                    Some(threshold) => {
                        reader.report(
                            ErrorKind::PlanSchema,
                            value,
                            &fields.child("above"),
                            format!("an overdispersion threshold (Pearson chi-square / df) is at least 1; found {threshold}"),
                        );
                        None
                    }
                    None => None,
                },
                (
                    ModelSpec::Generalized(GlmSpec {
                        family: GlmFamily::Poisson,
                        ..
                    }),
                    None,
                ) => {
                    reader.report(ErrorKind::PlanSchema, item, &item_path, "the negative-binomial fallback needs \"above\": the Pearson chi-square / df that triggers it".to_string());
                    None
                }
                _ => {
                    reader.report(
                        ErrorKind::PlanSchema,
                        item,
                        &item_path,
                        "the negative-binomial fallback applies to a Poisson model".to_string(),
                    );
                    None
                }
            },
            (2, 2) => match model {
                ModelSpec::Cumulative { .. } => Some(Fallback::MergeEmptyCategory),
                _ => {
                    reader.report(
                        ErrorKind::PlanSchema,
                        item,
                        &item_path,
                        "merging an empty category applies to a cumulative (ordinal) model"
                            .to_string(),
                    );
                    None
                }
            },
            (3, 3) => match model {
                ModelSpec::Cumulative {
                    link: crate::models::ordinal::CumulativeLink::Logit,
                } => Some(Fallback::PartialProportionalOdds),
                _ => {
                    reader.report(ErrorKind::PlanSchema, item, &item_path, "the partial-proportional-odds fallback applies to a cumulative logit model".to_string());
                    None
                }
            },
            _ => {
                reader.report(
                    ErrorKind::PlanSchema,
                    item,
                    &item_path,
                    "this remedy does not answer this condition; plannable pairs are separation → firth, overdispersion → negative-binomial, empty-category → merge-with-neighbour, non-proportional-odds → partial-proportional-odds"
                        .to_string(),
                );
                None
            }
        };
        match fallback {
            Some(fallback) if fallbacks.contains(&fallback) => {
                reader.report(
                    ErrorKind::PlanSchema,
                    item,
                    &item_path,
                    "this fallback is listed twice".to_string(),
                );
                complete = false;
            }
            Some(fallback) => fallbacks.push(fallback),
            None => complete = false,
        }
    }
    complete.then_some(fallbacks)
}

fn read_checks(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    model: &ModelSpec,
    has_strata: bool,
) -> Option<Vec<Check>> {
    let listed = reader.text_list(node, path)?;
    let mut checks = Vec::new();
    let mut complete = true;
    for (index, (_, item)) in listed.iter().enumerate() {
        let item_path = format!("{path}[{index}]");
        let Some(check) = reader.choice(
            item,
            &item_path,
            &[
                ("proportional-odds", Check::ProportionalOdds),
                ("treatment-by-stratum", Check::TreatmentByStratum),
            ],
        ) else {
            complete = false;
            continue;
        };
        let problem = match check {
            Check::ProportionalOdds if !matches!(model, ModelSpec::Cumulative { .. }) => {
                Some("the proportional-odds check applies to cumulative (ordinal) models")
            }
            Check::TreatmentByStratum if !has_strata => {
                Some("the treatment-by-stratum check needs strata")
            }
            _ => None,
        };
        match problem {
            Some(reason) => {
                reader.report(ErrorKind::PlanSchema, item, &item_path, reason.to_string());
                complete = false;
            }
            None => checks.push(check),
        }
    }
    complete.then_some(checks)
}

fn read_supportive(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    model: &ModelSpec,
    endpoint: &Endpoint,
    variables: &[Variable],
    has_strata: bool,
) -> Option<Vec<Supportive>> {
    let items = reader.list(node, path)?;
    let mut supportive = Vec::new();
    let mut complete = true;
    for (index, item) in items.iter().enumerate() {
        let item_path = format!("{path}[{index}]");
        let Some(fields) = reader.mapping(item, &item_path, &["test", "scores"], &["test"]) else {
            complete = false;
            continue;
        };
        if fields
            .get("test")
            .and_then(|value| {
                reader.choice(value, &fields.child("test"), &[("mantel-haenszel", 0)])
            })
            .is_none()
        {
            complete = false;
            continue;
        }
        if !matches!(model, ModelSpec::Cumulative { .. }) || !has_strata {
            reader.report(
                ErrorKind::PlanSchema,
                item,
                &item_path,
                "the Mantel-Haenszel tests support an ordinal endpoint analysed with strata"
                    .to_string(),
            );
            complete = false;
            continue;
        }
        let scores = match fields.get("scores") {
            None => None,
            Some(value) => {
                let items = reader.list(value, &fields.child("scores"))?;
                let mut scores = Vec::new();
                for (position, score) in items.iter().enumerate() {
                    scores.push(
                        reader.number(score, &format!("{}[{position}]", fields.child("scores")))?,
                    );
                }
                let levels = match &variables[endpoint.variable].kind {
                    VariableKind::Ordinal { levels } => levels.len(),
                    _ => 0,
                };
                if scores.len() != levels {
                    reader.report(
                        ErrorKind::PlanSchema,
                        value,
                        &fields.child("scores"),
                        format!(
                            "give one score per outcome level ({levels}); found {}",
                            scores.len()
                        ),
                    );
                    return None;
                }
                if scores.windows(2).any(|pair| pair[1] <= pair[0]) {
                    reader.report(
                        ErrorKind::PlanSchema,
                        value,
                        &fields.child("scores"),
                        "scores must increase with the outcome levels".to_string(),
                    );
                    return None;
                }
                Some(scores)
            }
        };
        supportive.push(Supportive::MantelHaenszel { scores });
    }
    complete.then_some(supportive)
}

fn read_terms(
    reader: &mut Reader<'_>,
    node: Option<&Node>,
    path: &str,
    variables: &[Variable],
    names: &[&str],
    factors_only: bool,
) -> Option<Vec<usize>> {
    let Some(node) = node else {
        return Some(Vec::new());
    };
    let listed = reader.text_list(node, path)?;
    let mut indices = Vec::new();
    let mut complete = true;
    for (position, (_, item)) in listed.iter().enumerate() {
        let item_path = format!("{path}[{position}]");
        match reader.reference(item, &item_path, "declared variable", names) {
            Some(index) => {
                let kind = &variables[index].kind;
                if factors_only && !matches!(kind, VariableKind::Factor { .. }) {
                    reader.report(
                        ErrorKind::PlanSchema,
                        item,
                        &item_path,
                        format!(
                            "a stratum must be a factor variable; \"{}\" is {}",
                            variables[index].name,
                            kind.name()
                        ),
                    );
                    complete = false;
                } else if matches!(kind, VariableKind::Ordinal { .. }) {
                    reader.report(
                        ErrorKind::PlanSchema,
                        item,
                        &item_path,
                        format!("\"{}\" is ordinal; declare it numeric to use it as a slope or factor to use it as categories", variables[index].name),
                    );
                    complete = false;
                } else {
                    indices.push(index);
                }
            }
            None => complete = false,
        }
    }
    complete.then_some(indices)
}

fn read_pooling(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    strata: &[usize],
    variables: &[Variable],
) -> Option<PoolingRule> {
    let fields = reader.mapping(node, path, &["below", "into"], &["below", "into"])?;
    if strata.is_empty() {
        reader.report(
            ErrorKind::PlanSchema,
            node,
            path,
            "a pooling rule needs strata to pool; add \"strata\"".to_string(),
        );
    }
    let below = fields.get("below").and_then(|value| {
        let below = reader.whole_number(value, &fields.child("below"))?;
        if below < 2 {
            reader.report(
                ErrorKind::PlanSchema,
                value,
                &fields.child("below"),
                format!("\"below\" must be at least 2; found {below}"),
            );
            return None;
        }
        usize::try_from(below).ok()
    });
    let into = fields
        .get("into")
        .and_then(|value| reader.text(value, &fields.child("into")));
    if let (Some(into), Some(into_node)) = (&into, fields.get("into")) {
        for stratum in strata {
            if let VariableKind::Factor {
                levels: Some(levels),
            } = &variables[*stratum].kind
                && levels.contains(into)
            {
                reader.report(
                        ErrorKind::PlanSchema,
                        into_node,
                        &fields.child("into"),
                        format!("the pooled level \"{into}\" is already a level of \"{}\"; choose another name", variables[*stratum].name),
                    );
            }
        }
    }
    Some(PoolingRule {
        below: below?,
        into: into?,
    })
}

fn read_contrasts(
    reader: &mut Reader<'_>,
    node: &Node,
    path: &str,
    treatment: &TreatmentSpec,
) -> Option<Vec<Contrast>> {
    let codes: Vec<&str> = treatment.arms.iter().map(|arm| arm.code.as_str()).collect();
    let default_id = |arm: usize, versus: usize| format!("{}-vs-{}", codes[arm], codes[versus]);
    if let Some((text, _)) = node.as_scalar() {
        let rule = reader.choice(node, path, &[("each-vs-reference", 0), ("all-pairs", 1)])?;
        let _ = text;
        let mut contrasts = Vec::new();
        if rule == 0 {
            for arm in 0..codes.len() {
                if arm != treatment.reference {
                    contrasts.push(Contrast {
                        id: default_id(arm, treatment.reference),
                        arm,
                        versus: treatment.reference,
                    });
                }
            }
        } else {
            for versus in 0..codes.len() {
                for arm in versus + 1..codes.len() {
                    contrasts.push(Contrast {
                        id: default_id(arm, versus),
                        arm,
                        versus,
                    });
                }
            }
        }
        return Some(contrasts);
    }
    let items = reader.list(node, path)?;
    if items.is_empty() {
        reader.report(
            ErrorKind::PlanSchema,
            node,
            path,
            "list at least one contrast".to_string(),
        );
        return None;
    }
    let mut contrasts: Vec<Contrast> = Vec::new();
    let mut complete = true;
    for (index, item) in items.iter().enumerate() {
        let item_path = format!("{path}[{index}]");
        let Some(fields) = reader.mapping(
            item,
            &item_path,
            &["id", "arm", "versus"],
            &["arm", "versus"],
        ) else {
            complete = false;
            continue;
        };
        let arm = fields.get("arm").and_then(|value| {
            reader.reference(value, &fields.child("arm"), "treatment arm", &codes)
        });
        let versus = fields.get("versus").and_then(|value| {
            reader.reference(value, &fields.child("versus"), "treatment arm", &codes)
        });
        let id = fields
            .get("id")
            .and_then(|value| reader.identifier(value, &fields.child("id")));
        match (arm, versus) {
            (Some(arm), Some(versus)) if arm == versus => {
                reader.report(
                    ErrorKind::PlanSchema,
                    item,
                    &item_path,
                    format!(
                        "a contrast compares two different arms; both are \"{}\"",
                        codes[arm]
                    ),
                );
                complete = false;
            }
            (Some(arm), Some(versus)) => {
                let id = id.unwrap_or_else(|| default_id(arm, versus));
                if contrasts.iter().any(|existing| existing.id == id) {
                    reader.report(
                        ErrorKind::PlanSchema,
                        item,
                        &item_path,
                        format!("contrast id \"{id}\" is used twice"),
                    );
                    complete = false;
                } else {
                    contrasts.push(Contrast { id, arm, versus });
                }
            }
            _ => complete = false,
        }
    }
    complete.then_some(contrasts)
}

fn read_estimand(reader: &mut Reader<'_>, node: &Node, path: &str) -> Option<Estimand> {
    const KEYS: &[&str] = &[
        "treatment",
        "population",
        "variable",
        "intercurrent-events",
        "summary-measure",
    ];
    let fields = reader.mapping(node, path, KEYS, KEYS)?;
    let text = |reader: &mut Reader<'_>, key: &str| {
        fields
            .get(key)
            .and_then(|value| reader.text(value, &fields.child(key)))
    };
    let treatment = text(reader, "treatment");
    let population = text(reader, "population");
    let variable = text(reader, "variable");
    let summary_measure = text(reader, "summary-measure");
    let events_node = fields.get("intercurrent-events")?;
    let items = reader.list(events_node, &fields.child("intercurrent-events"))?;
    let mut intercurrent_events = Vec::new();
    let mut complete = true;
    for (index, item) in items.iter().enumerate() {
        let item_path = format!("{}[{index}]", fields.child("intercurrent-events"));
        let Some(entry) = reader.mapping(
            item,
            &item_path,
            &["event", "strategy"],
            &["event", "strategy"],
        ) else {
            complete = false;
            continue;
        };
        let event = entry
            .get("event")
            .and_then(|value| reader.text(value, &entry.child("event")));
        let strategy = entry.get("strategy").and_then(|value| {
            reader.choice(
                value,
                &entry.child("strategy"),
                &[
                    ("treatment-policy", IntercurrentStrategy::TreatmentPolicy),
                    ("hypothetical", IntercurrentStrategy::Hypothetical),
                    ("composite", IntercurrentStrategy::Composite),
                    ("while-on-treatment", IntercurrentStrategy::WhileOnTreatment),
                    ("principal-stratum", IntercurrentStrategy::PrincipalStratum),
                ],
            )
        });
        match (event, strategy) {
            (Some(event), Some(strategy)) => {
                intercurrent_events.push(IntercurrentEvent { event, strategy })
            }
            _ => complete = false,
        }
    }
    if !complete {
        return None;
    }
    Some(Estimand {
        treatment: treatment?,
        population: population?,
        variable: variable?,
        intercurrent_events,
        summary_measure: summary_measure?,
    })
}
