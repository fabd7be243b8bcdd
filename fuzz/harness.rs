//! What each fuzz target does with its bytes. Shared by the cargo-fuzz
//! targets (`fuzz_targets/`) and the stable-Rust replay in
//! `tests/fuzz_regressions.rs`. Errors are fine; a panic, an abort or a
//! runaway allocation is a finding.

#![allow(dead_code)]

use std::path::Path;

/// `SampleSheet::parse` on arbitrary bytes, then the two-group design.
pub fn sample_sheet(data: &[u8]) {
    let path = Path::new("fuzz-sheet.tsv");
    if let Ok(sheet) = riffle::design::SampleSheet::parse(path, data, "sample") {
        for column in &sheet.columns {
            let _ = riffle::design::TwoGroupDesign::from_sheet(&sheet, column, None);
        }
        let _ = riffle::design::TwoGroupDesign::from_sheet(&sheet, "group", Some(("A", "B")));
    }
}

/// `open_matrix` on arbitrary bytes written to a file, then every block.
pub fn matrix(data: &[u8]) {
    let dir = tempfile::tempdir().expect("temporary folder");
    let path = dir.path().join("fuzz-matrix");
    std::fs::write(&path, data).expect("write fuzz input");
    let samples: Vec<String> = ["A_01", "A_02", "B_01", "B_02"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let Ok(mut source) = riffle::input::open_matrix(&path, "feature", &samples) else {
        return;
    };
    let mut block = riffle::input::FeatureBlock::default();
    let mut seen = 0u64;
    loop {
        match source.next_block(7, &mut block) {
            Ok(0) | Err(_) => break,
            Ok(n) => {
                assert_eq!(block.values.len(), n * samples.len());
                seen += n as u64;
                assert!(seen <= source.info().n_features, "more rows than announced");
            }
        }
    }
    // Seeking back and reading again must not panic either.
    if source.seek(0).is_ok() {
        let _ = source.next_block(3, &mut block);
    }
}

/// The spill reader on arbitrary records and ids files: the input is a
/// little-endian u32 length, that many bytes of records, then the ids.
pub fn spill(data: &[u8]) {
    if data.len() < 4 {
        return;
    }
    let (head, rest) = data.split_at(4);
    let at = u32::from_le_bytes(head.try_into().unwrap()) as usize;
    let (records, ids) = rest.split_at(at.min(rest.len()));
    let dir = tempfile::tempdir().expect("temporary folder");
    std::fs::write(dir.path().join(riffle::spill::RECORDS_FILE), records).expect("write");
    std::fs::write(dir.path().join(riffle::spill::IDS_FILE), ids).expect("write");
    let read_all = |mut reader: riffle::spill::SpillReader| {
        let mut id = String::new();
        while let Ok(Some(_)) = reader.next_record() {
            if reader.next_id(&mut id).is_err() {
                break;
            }
        }
    };
    if let Ok(reader) = riffle::spill::SpillReader::open(dir.path()) {
        read_all(reader);
    }
    // Later passes open without the checksum pass; that must hold up too.
    if let Ok(reader) = riffle::spill::SpillReader::open_unchecked(dir.path()) {
        read_all(reader);
    }
}
