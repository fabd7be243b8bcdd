//! riffle: feature-wise permutation testing with multiple-testing control
//! over very large feature sets.
//!
//! Stages, each a module: `input` (matrices, sample sheets) -> `design`
//! (labels and the shared relabelings) -> `kernel` (GEMM tiles and
//! exceedance counts) driven by `pipeline` (reader, workers, ordered
//! writer) -> `spill` (per-feature records on disk) -> `multitest` and
//! `maxt` (FDR and FWER out of core) -> `output` (results table). `scan`
//! ties them together; `cli` is the command-line edge.

pub mod adjust_table;
pub mod cli;
pub mod columns;
pub mod demo;
pub mod design;
pub mod error;
pub mod heap;
pub mod input;
pub mod inspect;
pub mod job;
pub mod kernel;
pub mod maxt;
pub mod merge;
pub mod multitest;
pub mod output;
pub mod perm_p;
pub mod pipeline;
pub mod progress;
pub mod provenance;
pub mod report;
pub mod resume;
pub mod scan;
pub mod shard;
pub mod simulate;
pub mod spill;
pub mod spill_ahead;
pub mod stats;
pub mod stepdown;
pub mod tail;

/// Printed in the README, the run record and every report.
pub const CAUTION: &str = "These are statistical screening results. They must be confirmed by \
independent validation and interpreted by qualified people before they inform any decision, \
least of all one about a person's health.";
