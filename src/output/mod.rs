//! Output stage: the results table and the run record.

pub mod table;

pub use table::{create_table, Cell, ColumnKind, TableFormat, TableWriter};
