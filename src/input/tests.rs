//! Round trips through the writers and readers, and one clear error (never a
//! panic) for each kind of bad input. Expected values come from the invented
//! data generated here; the f32 round trip relies on IEEE 754 widening f32 to
//! f64 exactly (common practice, no single source).

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::{
    ArrayRef, BooleanArray, Float32Array, Float64Array, Int32Array, Int64Array, LargeStringArray,
    RecordBatch, StringArray,
};
use arrow_schema::{DataType, Field, Schema};

use super::*;
use crate::error::RiffleError;

fn names(n: usize) -> Vec<String> {
    (1..=n).map(|i| format!("S{i}")).collect()
}

fn ids(rows: usize) -> Vec<String> {
    (0..rows).map(|r| format!("feat_{r:06}")).collect()
}

/// Invented values: dyadic fractions (exact in f32) with a NaN every 97 cells.
fn invented_values(rows: usize, n_samples: usize) -> Vec<f64> {
    (0..rows * n_samples)
        .map(|cell| {
            if cell % 97 == 5 {
                f64::NAN
            } else {
                ((cell * 37 + cell / n_samples * 11) % 2000) as f64 / 8.0 - 100.0
            }
        })
        .collect()
}

fn same_value(a: f64, b: f64) -> bool {
    (a.is_nan() && b.is_nan()) || a == b
}

fn write_matrix(
    path: &Path,
    format: MatrixFormat,
    value_type: ValueType,
    rows: usize,
    n_samples: usize,
    rows_per_batch: usize,
    chunk: usize,
) {
    let all_ids = ids(rows);
    let values = invented_values(rows, n_samples);
    let mut writer = create_matrix_writer(
        path,
        format,
        "feature",
        &names(n_samples),
        value_type,
        rows_per_batch,
    )
    .unwrap();
    let mut start = 0;
    while start < rows {
        let end = (start + chunk).min(rows);
        writer
            .write_block(
                &all_ids[start..end],
                &values[start * n_samples..end * n_samples],
            )
            .unwrap();
        start = end;
    }
    writer.finish().unwrap();
}

/// Read everything from the current position in blocks of `max_rows`,
/// checking that blocks are consecutive; returns ids and row-major values.
fn read_rest(source: &mut dyn FeatureSource, max_rows: usize) -> (Vec<String>, Vec<f64>) {
    let mut block = FeatureBlock::default();
    let mut all_ids = Vec::new();
    let mut all_values = Vec::new();
    let mut expected_first: Option<u64> = None;
    loop {
        let n = source.next_block(max_rows, &mut block).unwrap();
        if n == 0 {
            break;
        }
        assert!(n <= max_rows);
        assert_eq!(block.rows(), n);
        assert_eq!(block.values.len(), n * block.n_samples);
        if let Some(first) = expected_first {
            assert_eq!(block.first_index, first, "blocks must be consecutive");
        }
        expected_first = Some(block.first_index + n as u64);
        all_ids.extend(block.ids.iter().cloned());
        all_values.extend_from_slice(&block.values);
    }
    (all_ids, all_values)
}

fn check_round_trip(format: MatrixFormat, value_type: ValueType) {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("matrix.bin");
    let (rows, n_samples) = (1000, 9);
    write_matrix(&path, format, value_type, rows, n_samples, 128, 77);
    let expected_ids = ids(rows);
    let expected = invented_values(rows, n_samples);
    let chosen: Vec<String> = ["S7", "S2", "S9", "S4"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let chosen_index = [6, 1, 8, 3];
    let widen = |v: f64| match value_type {
        ValueType::F32 => v as f32 as f64,
        ValueType::F64 => v,
    };

    let mut source = open_matrix(&path, "feature", &chosen).unwrap();
    assert_eq!(source.info().format, format);
    assert_eq!(source.info().n_features, rows as u64);
    assert_eq!(source.info().sample_columns, names(n_samples));
    for max_rows in [1, 7, 128, 129, 1000, 5000] {
        source.seek(0).unwrap();
        let (got_ids, got_values) = read_rest(source.as_mut(), max_rows);
        assert_eq!(got_ids, expected_ids, "max_rows {max_rows}");
        for r in 0..rows {
            for (k, &s) in chosen_index.iter().enumerate() {
                let want = widen(expected[r * n_samples + s]);
                let got = got_values[r * chosen.len() + k];
                assert!(same_value(want, got), "row {r} sample {s}: {got} vs {want}");
            }
        }
    }
    for position in [0u64, 1, 127, 128, 129, 500, 999, 1000] {
        source.seek(position).unwrap();
        let mut block = FeatureBlock::default();
        let n = source.next_block(50, &mut block).unwrap();
        assert_eq!(
            n as u64,
            (rows as u64 - position).min(50),
            "seek {position}"
        );
        if n > 0 {
            assert_eq!(block.first_index, position);
            assert_eq!(block.ids[0], expected_ids[position as usize]);
            let want = widen(expected[position as usize * n_samples + 6]);
            assert!(same_value(block.row(0)[0], want));
        }
        let (rest_ids, _) = read_rest(source.as_mut(), 33);
        assert_eq!(rest_ids.len() as u64 + n as u64, rows as u64 - position);
    }
    assert!(source.seek(1001).is_err());
}

#[test]
fn round_trip_arrow_f32() {
    check_round_trip(MatrixFormat::ArrowIpc, ValueType::F32);
}

#[test]
fn round_trip_arrow_f64() {
    check_round_trip(MatrixFormat::ArrowIpc, ValueType::F64);
}

#[test]
fn round_trip_parquet_f32() {
    check_round_trip(MatrixFormat::Parquet, ValueType::F32);
}

#[test]
fn round_trip_parquet_f64() {
    check_round_trip(MatrixFormat::Parquet, ValueType::F64);
}

/// A matrix written with arrow directly: nulls, integer columns, a large-utf8
/// id column under another name, and extra columns that must be ignored.
fn mixed_batches() -> Vec<RecordBatch> {
    let schema = Arc::new(Schema::new(vec![
        Field::new("note", DataType::Utf8, true),
        Field::new("a", DataType::Float32, true),
        Field::new("gene", DataType::LargeUtf8, false),
        Field::new("b", DataType::Int32, true),
        Field::new("flag", DataType::Boolean, true),
        Field::new("c", DataType::Int64, false),
        Field::new("d", DataType::Float64, true),
    ]));
    (0..3)
        .map(|k| {
            let base = k * 10;
            let columns: Vec<ArrayRef> = vec![
                Arc::new(StringArray::from(vec![Some("x"); 10])),
                Arc::new(Float32Array::from_iter(
                    (0..10).map(|i| (i % 3 != 0).then_some((base + i) as f32 * 0.5)),
                )),
                Arc::new(LargeStringArray::from_iter_values(
                    (0..10).map(|i| format!("g{}", base + i)),
                )),
                Arc::new(Int32Array::from_iter(
                    (0..10).map(|i| (i != 4).then_some(-(base + i))),
                )),
                Arc::new(BooleanArray::from(vec![true; 10])),
                Arc::new(Int64Array::from_iter_values(
                    (0..10).map(|i| (base + i) as i64 * 1000),
                )),
                Arc::new(Float64Array::from_iter(
                    (0..10).map(|i| (i != 9).then_some((base + i) as f64 / 4.0)),
                )),
            ];
            RecordBatch::try_new(schema.clone(), columns).unwrap()
        })
        .collect()
}

fn write_arrow_batches(path: &Path, batches: &[RecordBatch]) {
    let file = std::fs::File::create(path).unwrap();
    let mut writer = arrow_ipc::writer::FileWriter::try_new(file, &batches[0].schema()).unwrap();
    for b in batches {
        writer.write(b).unwrap();
    }
    writer.finish().unwrap();
}

fn write_parquet_batches(path: &Path, batches: &[RecordBatch]) {
    let file = std::fs::File::create(path).unwrap();
    let properties = parquet::file::properties::WriterProperties::builder()
        .set_max_row_group_row_count(Some(10))
        .build();
    let mut writer =
        parquet::arrow::ArrowWriter::try_new(file, batches[0].schema(), Some(properties)).unwrap();
    for b in batches {
        writer.write(b).unwrap();
    }
    writer.close().unwrap();
}

#[test]
fn nulls_integers_and_extra_columns() {
    let dir = tempfile::tempdir().unwrap();
    let batches = mixed_batches();
    for (name, write) in [
        ("m.arrow", write_arrow_batches as fn(&Path, &[RecordBatch])),
        ("m.parquet", write_parquet_batches),
    ] {
        let path = dir.path().join(name);
        write(&path, &batches);
        let wanted: Vec<String> = ["d", "b", "a", "c"].iter().map(|s| s.to_string()).collect();
        let mut source = open_matrix(&path, "gene", &wanted).unwrap();
        assert_eq!(source.info().n_features, 30);
        assert_eq!(source.info().sample_columns, vec!["a", "b", "c", "d"]);
        let (got_ids, values) = read_rest(source.as_mut(), 4);
        assert_eq!(got_ids.len(), 30);
        for r in 0..30usize {
            let i = r % 10;
            assert_eq!(got_ids[r], format!("g{r}"));
            let row = &values[r * 4..r * 4 + 4];
            let d = if i == 9 { f64::NAN } else { r as f64 / 4.0 };
            let b = if i == 4 { f64::NAN } else { -(r as f64) };
            let a = if i % 3 == 0 { f64::NAN } else { r as f64 * 0.5 };
            let c = r as f64 * 1000.0;
            for (got, want) in row.iter().zip([d, b, a, c]) {
                assert!(same_value(*got, want), "{name} row {r}: {row:?}");
            }
        }
    }
}

#[test]
fn arrow_reading_is_zero_copy() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("m.arrow");
    write_matrix(
        &path,
        MatrixFormat::ArrowIpc,
        ValueType::F32,
        300,
        5,
        100,
        300,
    );
    let wanted = vec!["S3".to_string(), "S1".to_string()];
    let (mut stream, mmap) = ipc_file::open_for_test(&path, "feature", &wanted).unwrap();
    let mut block = FeatureBlock::default();
    assert_eq!(stream.next_block(10, &mut block).unwrap(), 10);
    let range = mmap.as_ptr() as usize..mmap.as_ptr() as usize + mmap.len();
    let batch = stream.current_batch().expect("a batch is loaded");
    for column in &batch.values {
        assert!(
            range.contains(&(column.values_ptr() as usize)),
            "column values were copied out of the memory map"
        );
    }
}

#[test]
fn format_is_detected_from_content_not_name() {
    let dir = tempfile::tempdir().unwrap();
    let arrow_named_parquet = dir.path().join("looks.parquet");
    write_matrix(
        &arrow_named_parquet,
        MatrixFormat::ArrowIpc,
        ValueType::F64,
        20,
        3,
        8,
        20,
    );
    assert_eq!(
        detect_format(&arrow_named_parquet).unwrap(),
        MatrixFormat::ArrowIpc
    );
    let source = open_matrix(&arrow_named_parquet, "feature", &names(2)).unwrap();
    assert_eq!(source.info().format, MatrixFormat::ArrowIpc);

    let parquet_named_arrow = dir.path().join("looks.arrow");
    write_matrix(
        &parquet_named_arrow,
        MatrixFormat::Parquet,
        ValueType::F64,
        20,
        3,
        8,
        20,
    );
    assert_eq!(
        detect_format(&parquet_named_arrow).unwrap(),
        MatrixFormat::Parquet
    );
}

#[test]
fn writer_output_does_not_depend_on_chunking() {
    let dir = tempfile::tempdir().unwrap();
    for format in [MatrixFormat::ArrowIpc, MatrixFormat::Parquet] {
        let one = dir.path().join("one");
        let two = dir.path().join("two");
        write_matrix(&one, format, ValueType::F32, 500, 4, 64, 500);
        write_matrix(&two, format, ValueType::F32, 500, 4, 64, 3);
        assert_eq!(
            std::fs::read(&one).unwrap(),
            std::fs::read(&two).unwrap(),
            "{format:?}"
        );
    }
}

#[test]
fn dropped_writer_leaves_no_file() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("never.arrow");
    let mut writer = create_matrix_writer(
        &path,
        MatrixFormat::Parquet,
        "feature",
        &names(2),
        ValueType::F64,
        10,
    )
    .unwrap();
    writer.write_block(&ids(3), &invented_values(3, 2)).unwrap();
    assert!(writer.write_block(&ids(3), &[1.0]).is_err());
    drop(writer);
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
}

/// Open and read the whole matrix; either step may fail, neither may panic.
fn open_and_read_all(path: &Path, samples: &[String]) -> Result<u64> {
    let mut source = open_matrix(path, "feature", samples)?;
    let mut block = FeatureBlock::default();
    let mut total = 0;
    loop {
        let n = source.next_block(64, &mut block)?;
        if n == 0 {
            return Ok(total);
        }
        total += n as u64;
    }
}

fn bad_input_message(result: Result<impl std::fmt::Debug>, path: &Path) -> String {
    match result {
        Err(error @ RiffleError::BadInput { .. }) => {
            let text = error.to_string();
            assert!(
                text.contains(&path.display().to_string()),
                "message does not name the file: {text}"
            );
            text
        }
        other => panic!("expected a bad-input error, got {other:?}"),
    }
}

fn write_bytes(dir: &Path, name: &str, bytes: &[u8]) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, bytes).unwrap();
    path
}

#[test]
fn empty_wrong_magic_and_text_files() {
    let dir = tempfile::tempdir().unwrap();
    let empty = write_bytes(dir.path(), "empty.arrow", b"");
    assert!(bad_input_message(open_and_read_all(&empty, &names(1)), &empty).contains("empty"));
    let junk = write_bytes(
        dir.path(),
        "junk.parquet",
        &[0u8, 1, 2, 3, 200, 150, 7, 9, 0, 0],
    );
    assert!(bad_input_message(detect_format(&junk), &junk).contains("unrecognised"));
    let text = write_bytes(dir.path(), "m.parquet", b"feature\tS1\tS2\ng1\t1.5\t2.5\n");
    assert!(bad_input_message(detect_format(&text), &text).contains("riffle import"));
    let tiny = write_bytes(dir.path(), "tiny", b"PAR1");
    bad_input_message(detect_format(&tiny), &tiny);
}

fn small_file(format: MatrixFormat) -> (tempfile::TempDir, Vec<u8>) {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("m");
    write_matrix(&path, format, ValueType::F64, 60, 3, 16, 60);
    let bytes = std::fs::read(&path).unwrap();
    (dir, bytes)
}

#[test]
fn truncated_arrow_file_is_bad_input() {
    let (dir, bytes) = small_file(MatrixFormat::ArrowIpc);
    let len = bytes.len();
    for cut in [
        1,
        6,
        8,
        17,
        100,
        len / 3,
        len / 2,
        len - 11,
        len - 10,
        len - 1,
    ] {
        let path = write_bytes(dir.path(), "cut.arrow", &bytes[..cut]);
        bad_input_message(open_and_read_all(&path, &names(3)), &path);
    }
    // Data section cut short while the footer survives: blocks point past it.
    let footer_len = i32::from_le_bytes(bytes[len - 10..len - 6].try_into().unwrap()) as usize;
    let footer_start = len - 10 - footer_len;
    let mut shortened = bytes[..footer_start / 2].to_vec();
    shortened.extend_from_slice(&bytes[footer_start..]);
    let path = write_bytes(dir.path(), "short.arrow", &shortened);
    let message = bad_input_message(open_and_read_all(&path, &names(3)), &path);
    assert!(message.contains("record batch"), "{message}");
}

#[test]
fn corrupted_arrow_footer_is_bad_input() {
    let (dir, bytes) = small_file(MatrixFormat::ArrowIpc);
    let len = bytes.len();
    let footer_len = i32::from_le_bytes(bytes[len - 10..len - 6].try_into().unwrap()) as usize;
    let footer_start = len - 10 - footer_len;
    // Footer length pointing before the start of the file.
    let mut huge = bytes.clone();
    huge[len - 10..len - 6].copy_from_slice(&(len as i32).to_le_bytes());
    let path = write_bytes(dir.path(), "huge.arrow", &huge);
    assert!(bad_input_message(open_and_read_all(&path, &names(3)), &path).contains("footer"));
    // Footer overwritten with garbage.
    let mut garbage = bytes.clone();
    for b in &mut garbage[footer_start..len - 10] {
        *b = 0xA5;
    }
    let path = write_bytes(dir.path(), "garbage.arrow", &garbage);
    assert!(bad_input_message(open_and_read_all(&path, &names(3)), &path).contains("footer"));
}

/// Flip every byte of a small file in turn: each variant must either read or
/// fail with an error, never escape as a panic or crash.
fn flip_every_byte(format: MatrixFormat) {
    let (dir, bytes) = small_file(format);
    let path = dir.path().join("flipped");
    let mut failures = 0;
    for at in 0..bytes.len() {
        let mut damaged = bytes.clone();
        damaged[at] ^= 0x5A;
        std::fs::write(&path, &damaged).unwrap();
        if open_and_read_all(&path, &names(3)).is_err() {
            failures += 1;
        }
    }
    assert!(failures > 0);
}

#[test]
fn every_damaged_byte_of_arrow_file_is_handled() {
    flip_every_byte(MatrixFormat::ArrowIpc);
}

#[test]
fn every_damaged_byte_of_parquet_file_is_handled() {
    flip_every_byte(MatrixFormat::Parquet);
}

#[test]
fn truncated_parquet_file_is_bad_input() {
    let (dir, bytes) = small_file(MatrixFormat::Parquet);
    let len = bytes.len();
    for cut in [2, 4, 12, len / 3, len / 2, len - 9, len - 8, len - 1] {
        let path = write_bytes(dir.path(), "cut.parquet", &bytes[..cut]);
        bad_input_message(open_and_read_all(&path, &names(3)), &path);
    }
    // Column chunks cut out while the footer survives.
    let footer_len = u32::from_le_bytes(bytes[len - 8..len - 4].try_into().unwrap()) as usize;
    let footer_start = len - 8 - footer_len;
    let mut shortened = bytes[..footer_start / 2].to_vec();
    shortened.extend_from_slice(&bytes[footer_start..]);
    let path = write_bytes(dir.path(), "short.parquet", &shortened);
    bad_input_message(open_and_read_all(&path, &names(3)), &path);
}

fn schema_problem_files(dir: &Path) -> Vec<(PathBuf, &'static str, Vec<String>, &'static str)> {
    let ids_as_numbers = {
        let schema = Arc::new(Schema::new(vec![
            Field::new("feature", DataType::Int64, false),
            Field::new("S1", DataType::Float64, false),
            Field::new("S2", DataType::Utf8, false),
        ]));
        RecordBatch::try_new(
            schema,
            vec![
                Arc::new(Int64Array::from(vec![1, 2])),
                Arc::new(Float64Array::from(vec![0.5, 1.5])),
                Arc::new(StringArray::from(vec!["high", "low"])),
            ],
        )
        .unwrap()
    };
    let good_ids = {
        let schema = Arc::new(Schema::new(vec![
            Field::new("feature", DataType::Utf8, false),
            Field::new("S1", DataType::Float64, false),
            Field::new("S2", DataType::Utf8, false),
        ]));
        RecordBatch::try_new(
            schema,
            vec![
                Arc::new(StringArray::from(vec!["g1", "g2"])),
                Arc::new(Float64Array::from(vec![0.5, 1.5])),
                Arc::new(StringArray::from(vec!["high", "low"])),
            ],
        )
        .unwrap()
    };
    let mut cases = Vec::new();
    for (ext, write) in [
        ("arrow", write_arrow_batches as fn(&Path, &[RecordBatch])),
        ("parquet", write_parquet_batches),
    ] {
        let numeric_ids = dir.join(format!("numeric_ids.{ext}"));
        write(&numeric_ids, std::slice::from_ref(&ids_as_numbers));
        let good = dir.join(format!("good_ids.{ext}"));
        write(&good, std::slice::from_ref(&good_ids));
        cases.push((
            numeric_ids,
            "feature",
            vec!["S1".to_string()],
            "found Int64",
        ));
        cases.push((
            good.clone(),
            "probe",
            vec!["S1".to_string()],
            "no feature id column 'probe'",
        ));
        cases.push((
            good.clone(),
            "feature",
            vec!["S2".to_string()],
            "column 'S2'",
        ));
        let many_missing: Vec<String> = ["S1", "T1", "T2", "T3", "T4", "T5", "T6", "T7"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        cases.push((
            good,
            "feature",
            many_missing,
            "7 of 8 samples named in the sample sheet have no column in this matrix: 'T1', 'T2', 'T3', 'T4', 'T5' and 2 more",
        ));
    }
    cases
}

#[test]
fn schema_problems_are_named() {
    let dir = tempfile::tempdir().unwrap();
    for (path, id_column, samples, expected) in schema_problem_files(dir.path()) {
        let result = open_matrix(&path, id_column, &samples).map(|_| ());
        let message = bad_input_message(result, &path);
        assert!(message.contains(expected), "{message} lacks {expected}");
    }
}

#[test]
fn null_feature_id_is_bad_input() {
    let dir = tempfile::tempdir().unwrap();
    let schema = Arc::new(Schema::new(vec![
        Field::new("feature", DataType::Utf8, true),
        Field::new("S1", DataType::Float64, false),
    ]));
    let batch = RecordBatch::try_new(
        schema,
        vec![
            Arc::new(StringArray::from(vec![Some("g1"), None, Some("g3")])),
            Arc::new(Float64Array::from(vec![0.5, 1.5, 2.5])),
        ],
    )
    .unwrap();
    let path = dir.path().join("null_id.arrow");
    write_arrow_batches(&path, &[batch]);
    let message = bad_input_message(open_and_read_all(&path, &names(1)), &path);
    assert!(message.contains("feature row 2"), "{message}");
}

/// Throughput and peak memory for streaming a ~1 GB Arrow IPC f32 matrix of
/// 48 samples. Run with `cargo test --release -- --ignored --nocapture`.
#[test]
#[ignore]
fn measure_arrow_streaming() {
    let dir =
        tempfile::tempdir_in(std::env::var("RIFFLE_MEASURE_DIR").unwrap_or(".".into())).unwrap();
    let path = dir.path().join("big.arrow");
    let (rows, n_samples) = (5_400_000usize, 48usize);
    let samples = names(n_samples);
    {
        let mut writer = create_matrix_writer(
            &path,
            MatrixFormat::ArrowIpc,
            "feature",
            &samples,
            ValueType::F32,
            65_536,
        )
        .unwrap();
        let chunk = 100_000;
        let values = invented_values(chunk, n_samples);
        let mut start = 0;
        while start < rows {
            let n = chunk.min(rows - start);
            let chunk_ids: Vec<String> =
                (start..start + n).map(|r| format!("feat_{r:08}")).collect();
            writer
                .write_block(&chunk_ids, &values[..n * n_samples])
                .unwrap();
            start += n;
        }
        writer.finish().unwrap();
    }
    let file_bytes = std::fs::metadata(&path).unwrap().len();
    let rss_before = status_kib("VmRSS");
    // Reset the peak so VmHWM covers reading only (Linux 4.0+, see proc(5)).
    let _ = std::fs::write("/proc/self/clear_refs", "5");
    let started = std::time::Instant::now();
    let mut source = open_matrix(&path, "feature", &samples).unwrap();
    let mut block = FeatureBlock::default();
    let (mut total, mut checksum, mut rss_peak) = (0u64, 0.0f64, 0u64);
    loop {
        let n = source.next_block(4096, &mut block).unwrap();
        if n == 0 {
            break;
        }
        checksum += block.values[block.values.len() - 1];
        total += n as u64;
        if total % (4096 * 64) == 0 {
            rss_peak = rss_peak.max(status_kib("VmRSS"));
        }
    }
    let seconds = started.elapsed().as_secs_f64();
    assert_eq!(total, rows as u64);
    println!(
        "file {:.0} MB, {rows} features x {n_samples} samples in {seconds:.2} s: {:.0} MB/s of file, \
         {:.0} MB/s of f64 output; VmRSS before {} MB, highest sampled while reading {} MB; \
         VmHWM while reading {} MB (checksum {checksum})",
        file_bytes as f64 / 1e6,
        file_bytes as f64 / 1e6 / seconds,
        (total as f64 * n_samples as f64 * 8.0) / 1e6 / seconds,
        rss_before / 1024,
        rss_peak / 1024,
        status_kib("VmHWM") / 1024,
    );
}

fn status_kib(key: &str) -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .unwrap_or_default()
        .lines()
        .find(|l| l.starts_with(key))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|v| v.parse().ok())
        .unwrap_or(0)
}

/// Resident kilobytes of the mapping that starts at `start`, from
/// /proc/self/smaps (Linux).
#[cfg(target_os = "linux")]
fn mapping_rss_kb(start: usize) -> usize {
    let smaps = std::fs::read_to_string("/proc/self/smaps").unwrap();
    let mut in_mapping = false;
    for line in smaps.lines() {
        if let Some((range, _)) = line.split_once(' ') {
            if let Some((from, _)) = range.split_once('-') {
                if let Ok(from) = usize::from_str_radix(from, 16) {
                    in_mapping = from == start;
                    continue;
                }
            }
        }
        if in_mapping {
            if let Some(rest) = line.strip_prefix("Rss:") {
                return rest.trim().trim_end_matches("kB").trim().parse().unwrap();
            }
        }
    }
    panic!("no mapping at {start:#x}");
}

/// An Arrow IPC matrix of `rows` x 4 f32 in batches of `rows_per_batch`,
/// opened on its map: the stream, the map and the file's size.
#[cfg(target_os = "linux")]
fn mapped_four_column_matrix(
    dir: &Path,
    rows: usize,
    rows_per_batch: usize,
) -> (
    crate::input::columns::RowStream<ipc_file::IpcBatchSource>,
    Arc<memmap2::Mmap>,
    usize,
) {
    let path = dir.join("m.arrow");
    write_matrix(
        &path,
        MatrixFormat::ArrowIpc,
        ValueType::F32,
        rows,
        4,
        rows_per_batch,
        rows_per_batch,
    );
    let file_bytes = std::fs::metadata(&path).unwrap().len() as usize;
    let (stream, mmap) = ipc_file::open_for_test(&path, "feature", &names(4)).unwrap();
    (stream, mmap, file_bytes)
}

/// The read part of a record batch is handed back as the reader goes: with
/// one batch of 200,000 rows x 4 f32 (3.2 MB of values, ~2.7 MB of ids),
/// after reading 3/4 of it in chunks the mapping keeps far less than the
/// 4.4 MB read (without the release every page read stays resident).
#[cfg(target_os = "linux")]
#[test]
fn arrow_reading_hands_back_read_pages() {
    let dir = tempfile::tempdir().unwrap();
    let rows = 200_000;
    let (mut stream, mmap, _) = mapped_four_column_matrix(dir.path(), rows, rows);
    let mut block = FeatureBlock::default();
    let mut read = 0;
    while read < rows * 3 / 4 {
        read += stream.next_block(2_000, &mut block).unwrap();
    }
    let bytes_read = read * 4 * 4 + read * 14;
    let resident = mapping_rss_kb(mmap.as_ptr() as usize) * 1024;
    assert!(
        resident < bytes_read / 4,
        "{resident} bytes of the map resident after reading {bytes_read}"
    );
}

/// Opening a file of many record batches reads a header in each; those
/// pages are handed back before the first row is read, so the map starts
/// nearly empty however many batches the file has (400 batches, ~6 MB).
#[cfg(target_os = "linux")]
#[test]
fn arrow_opening_keeps_no_batch_pages_resident() {
    let dir = tempfile::tempdir().unwrap();
    let (_stream, mmap, file_bytes) = mapped_four_column_matrix(dir.path(), 200_000, 500);
    let resident = mapping_rss_kb(mmap.as_ptr() as usize) * 1024;
    assert!(
        resident < file_bytes / 20,
        "{resident} bytes of a {file_bytes}-byte map resident after opening it"
    );
}
