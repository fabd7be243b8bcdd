//! Output stage: the results table and the run record.

mod encode;
pub mod table;

pub use table::{create_table, Cell, ColumnKind, TableFormat, TableWriter};
