//! cairn runs a pre-specified clinical-trial analysis plan exactly as written.
//!
//! The pipeline, one module per stage:
//!
//! ```text
//! plan (YAML → typed, validated Plan)
//!   → data (CSV → typed columns, subjects joined with the allocation list)
//!   → design (population, complete cases, pooling → model matrix with named terms)
//!   → models (pure numeric fits: least squares, …)
//!   → inference (tests, contrasts, adjusted means)
//!   → results (results.json) → report (Markdown → HTML, tables)
//! provenance (SHA-256 of inputs and outputs, lock records) and output
//! (atomic writes) sit at the edges; `run` wires the stages together.
//! ```
//!
//! The numeric stages (design, models, inference) do no I/O and read no
//! clock; everything a run writes is a pure function of its inputs and the
//! tool version.

pub mod data;
pub mod design;
pub mod error;
pub mod inference;
pub mod models;
pub mod multiplicity;
pub mod output;
pub mod plan;
pub mod provenance;
pub mod report;
pub mod results;
pub mod run;
pub mod verify;

pub use error::{Error, ErrorKind, Location, Problem};
pub use plan::{Plan, load as load_plan};
