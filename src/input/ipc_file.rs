//! Arrow IPC file reader: zero-copy record batches decoded straight from a
//! memory map, with each batch's pages handed back to the kernel once read.

use std::cell::Cell;
use std::fs::File;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::{Path, PathBuf};
use std::ptr::NonNull;
use std::sync::{Arc, Once};

use arrow_buffer::Buffer;
use arrow_ipc::reader::{read_footer_length, FileDecoder};
use arrow_ipc::MessageHeader;
use memmap2::{Advice, Mmap, UncheckedAdvice};

use super::columns::{plan_columns, BatchSource, LoadedBatch, RowStream};
use super::{FeatureSource, MatrixFormat, MatrixInfo, ARROW_FILE_HEAD, ARROW_FILE_TAIL};
use crate::error::{IoContext, Result, RiffleError};

/// Footer length (4 bytes) and the "ARROW1" trailer.
const TRAILER_LEN: usize = 10;
/// Continuation marker (4 bytes) and metadata length (4 bytes).
const MESSAGE_PREFIX_LEN: usize = 8;

/// One record batch as located by the footer, checked against the file size.
#[derive(Debug, Clone, Copy)]
struct BlockLocation {
    offset: usize,
    metadata_len: usize,
    body_len: usize,
    rows: usize,
    first_index: u64,
}

impl BlockLocation {
    fn total_len(&self) -> usize {
        self.metadata_len + self.body_len
    }
}

pub(crate) struct IpcBatchSource {
    info: MatrixInfo,
    /// Keeps the mapping alive for the page-release calls; `whole` co-owns it.
    mmap: Arc<Mmap>,
    whole: Buffer,
    decoder: FileDecoder,
    blocks: Vec<BlockLocation>,
    next_block: usize,
    /// Block whose pages are resident because a batch was decoded from it.
    resident_block: Option<usize>,
    samples: Vec<String>,
}

fn corrupt(path: &Path, place: impl Into<String>, detail: impl std::fmt::Display) -> RiffleError {
    RiffleError::bad_input(
        path,
        place,
        format!("the Arrow IPC file is corrupt or truncated ({detail})"),
    )
}

fn panic_text(payload: &(dyn std::any::Any + Send)) -> String {
    payload
        .downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| payload.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "reader failure".to_string())
}

thread_local! {
    /// Set while a guarded decoder call runs on this thread.
    static IN_GUARDED_DECODE: Cell<bool> = const { Cell::new(false) };
}

/// Keep a caught decoder panic off stderr: it becomes a bad-input error, and
/// the raw panic text would only confuse. Other panics print as before.
fn install_quiet_hook() {
    static INSTALL: Once = Once::new();
    INSTALL.call_once(|| {
        let previous = std::panic::take_hook();
        std::panic::set_hook(Box::new(move |info| {
            if !IN_GUARDED_DECODE.with(Cell::get) {
                previous(info);
            }
        }));
    });
}

/// Last line of defence: arrow and parquet can still panic on malformed data
/// that our own checks did not anticipate; that must reach the user as a
/// bad-input error, not a crash.
pub(crate) fn without_panic<T>(
    path: &Path,
    place: impl FnOnce() -> String,
    work: impl FnOnce() -> Result<T>,
) -> Result<T> {
    install_quiet_hook();
    let was_guarded = IN_GUARDED_DECODE.with(|g| g.replace(true));
    let outcome = catch_unwind(AssertUnwindSafe(work));
    IN_GUARDED_DECODE.with(|g| g.set(was_guarded));
    match outcome {
        Ok(result) => result,
        Err(payload) => Err(RiffleError::bad_input(
            path,
            place(),
            format!(
                "the file is corrupt; the decoder failed with: {}",
                panic_text(payload.as_ref())
            ),
        )),
    }
}

fn read_i32_le(bytes: &[u8], at: usize) -> i32 {
    i32::from_le_bytes([bytes[at], bytes[at + 1], bytes[at + 2], bytes[at + 3]])
}

/// Check a footer block against the file and read its row count from the
/// message header, without touching the body.
fn locate_block(
    path: &Path,
    bytes: &[u8],
    footer_start: usize,
    block: &arrow_ipc::Block,
    place: &str,
    expect: MessageHeader,
) -> Result<(usize, usize, usize, usize)> {
    let (offset, metadata_len, body_len) =
        (block.offset(), block.metaDataLength(), block.bodyLength());
    if offset < ARROW_FILE_HEAD.len() as i64
        || metadata_len < MESSAGE_PREFIX_LEN as i32
        || body_len < 0
    {
        return Err(corrupt(
            path,
            place,
            format!("invalid block: offset {offset}, metadata {metadata_len} bytes, body {body_len} bytes"),
        ));
    }
    let (offset, metadata_len, body_len) = (offset as u64, metadata_len as u64, body_len as u64);
    let end = offset
        .checked_add(metadata_len)
        .and_then(|e| e.checked_add(body_len));
    if end.is_none_or(|e| e > footer_start as u64) {
        return Err(corrupt(
            path,
            place,
            format!(
                "the block at byte {offset} ({} bytes) runs past the data section, which ends at byte {footer_start}",
                metadata_len + body_len
            ),
        ));
    }
    let (offset, metadata_len, body_len) =
        (offset as usize, metadata_len as usize, body_len as usize);
    let metadata = &bytes[offset..offset + metadata_len];
    // Pre-1.0 writers omitted the continuation marker.
    let flatbuffer_start = if metadata[..4] == [0xFF; 4] { 8 } else { 4 };
    let declared = read_i32_le(metadata, flatbuffer_start - 4);
    if declared < 0 || flatbuffer_start + declared as usize > metadata_len {
        return Err(corrupt(
            path,
            place,
            format!("message length {declared} does not fit in its {metadata_len}-byte block"),
        ));
    }
    let message = arrow_ipc::root_as_message(
        &metadata[flatbuffer_start..flatbuffer_start + declared as usize],
    )
    .map_err(|e| corrupt(path, place, format!("unreadable message header: {e}")))?;
    if message.header_type() != expect {
        return Err(corrupt(
            path,
            place,
            format!(
                "expected a {:?} message, found {:?}",
                expect,
                message.header_type()
            ),
        ));
    }
    if message.bodyLength() != body_len as i64 {
        return Err(corrupt(
            path,
            place,
            format!(
                "the message declares a {}-byte body but the footer says {body_len}",
                message.bodyLength()
            ),
        ));
    }
    let header = match expect {
        MessageHeader::DictionaryBatch => {
            message.header_as_dictionary_batch().and_then(|d| d.data())
        }
        _ => message.header_as_record_batch(),
    }
    .ok_or_else(|| corrupt(path, place, "the message has no record batch header"))?;
    let rows = header.length();
    if rows < 0 {
        return Err(corrupt(path, place, format!("negative row count {rows}")));
    }
    for buffer in header.buffers().into_iter().flatten() {
        let (b_offset, b_len) = (buffer.offset(), buffer.length());
        if b_offset < 0 || b_len < 0 || (b_offset as u64 + b_len as u64) > body_len as u64 {
            return Err(corrupt(
                path,
                place,
                format!(
                    "a buffer at body offset {b_offset} of {b_len} bytes lies outside the {body_len}-byte body"
                ),
            ));
        }
    }
    Ok((offset, metadata_len, body_len, rows as usize))
}

pub(crate) fn open(
    path: &Path,
    id_column: &str,
    samples: &[String],
) -> Result<Box<dyn FeatureSource>> {
    let file = File::open(path).at(path)?;
    // SAFETY: the map is read-only; riffle's inputs are not expected to be
    // modified while a run reads them (the same assumption any reader makes).
    let mmap = unsafe { Mmap::map(&file) }.at(path)?;
    // Readahead helps the one-pass streaming this source is built for.
    let _ = mmap.advise(Advice::Sequential);
    let mmap = Arc::new(mmap);
    let source = IpcBatchSource::new(path, mmap, id_column, samples)?;
    let n_samples = samples.len();
    Ok(Box::new(RowStream::new(source, n_samples)))
}

impl IpcBatchSource {
    fn new(path: &Path, mmap: Arc<Mmap>, id_column: &str, samples: &[String]) -> Result<Self> {
        let bytes: &[u8] = &mmap;
        let len = bytes.len();
        if len < ARROW_FILE_HEAD.len() + TRAILER_LEN || !bytes.starts_with(ARROW_FILE_HEAD) {
            return Err(corrupt(path, "start of file", "missing 'ARROW1' header"));
        }
        if !bytes.ends_with(ARROW_FILE_TAIL) {
            return Err(corrupt(path, "end of file", "missing 'ARROW1' trailer"));
        }
        let trailer: [u8; TRAILER_LEN] = bytes[len - TRAILER_LEN..]
            .try_into()
            .map_err(|_| RiffleError::Internal("trailer slice length".into()))?;
        let footer_len = read_footer_length(trailer).map_err(|e| corrupt(path, "footer", e))?;
        let data_end = len - TRAILER_LEN;
        if footer_len == 0 || footer_len > data_end - ARROW_FILE_HEAD.len() {
            return Err(corrupt(
                path,
                "footer",
                format!("footer length {footer_len} does not fit in a {len}-byte file"),
            ));
        }
        let footer_start = data_end - footer_len;
        let footer = arrow_ipc::root_as_footer(&bytes[footer_start..data_end])
            .map_err(|e| corrupt(path, "footer", format!("unreadable footer: {e}")))?;
        let fb_schema = footer
            .schema()
            .ok_or_else(|| corrupt(path, "footer", "the footer has no schema"))?;
        if !fb_schema.endianness().equals_to_target_endianness() {
            return Err(RiffleError::bad_input(
                path,
                "footer",
                "the file was written with the other byte order, which riffle does not convert",
            ));
        }
        let schema = without_panic(
            path,
            || "footer schema".to_string(),
            || {
                arrow_ipc::convert::try_fb_to_schema(fb_schema)
                    .map_err(|e| corrupt(path, "footer schema", e))
            },
        )?;
        let plan = plan_columns(path, &schema, id_column, samples)?;

        let address = NonNull::new(mmap.as_ptr() as *mut u8)
            .ok_or_else(|| RiffleError::Internal("memory map at null address".into()))?;
        // SAFETY: the pointer and length describe the live mapping, and the
        // Arc<Mmap> owner stored in the buffer keeps it mapped while any
        // decoded array still refers to it.
        let whole = unsafe { Buffer::from_custom_allocation(address, len, mmap.clone()) };

        let mut decoder = FileDecoder::new(Arc::new(schema), footer.version())
            .with_projection(plan.projection())
            .with_require_alignment(true);

        if let Some(dictionaries) = footer.dictionaries() {
            for (k, block) in dictionaries.iter().enumerate() {
                let place = format!("dictionary {} of {}", k + 1, dictionaries.len());
                let (offset, metadata_len, body_len, _) = locate_block(
                    path,
                    bytes,
                    footer_start,
                    block,
                    &place,
                    MessageHeader::DictionaryBatch,
                )?;
                let data = whole.slice_with_length(offset, metadata_len + body_len);
                without_panic(
                    path,
                    || place.clone(),
                    || {
                        decoder
                            .read_dictionary(block, &data)
                            .map_err(|e| corrupt(path, place.as_str(), e))
                    },
                )?;
            }
        }

        let record_batches = footer
            .recordBatches()
            .ok_or_else(|| corrupt(path, "footer", "the footer lists no record batches"))?;
        let mut blocks = Vec::with_capacity(record_batches.len());
        let mut n_features: u64 = 0;
        for (k, block) in record_batches.iter().enumerate() {
            let place = format!(
                "record batch {} of {} (byte {})",
                k + 1,
                record_batches.len(),
                block.offset()
            );
            let (offset, metadata_len, body_len, rows) = locate_block(
                path,
                bytes,
                footer_start,
                block,
                &place,
                MessageHeader::RecordBatch,
            )?;
            blocks.push(BlockLocation {
                offset,
                metadata_len,
                body_len,
                rows,
                first_index: n_features,
            });
            n_features += rows as u64;
        }
        // Locating the batches touched a page of each across the whole
        // file, and every fault mapped its neighbours too: on 10,000,000
        // features that kept ~10 MB of the map resident for the whole run.
        // SAFETY: as in `release_resident_block`: a read-only shared mapping
        // re-reads released pages from the file on access.
        let _ = unsafe { mmap.unchecked_advise_range(UncheckedAdvice::DontNeed, 0, len) };

        Ok(IpcBatchSource {
            info: MatrixInfo {
                path: path.to_path_buf(),
                format: MatrixFormat::ArrowIpc,
                n_features,
                sample_columns: plan.numeric_columns,
                id_column: id_column.to_string(),
            },
            mmap,
            whole,
            decoder,
            blocks,
            next_block: 0,
            resident_block: None,
            samples: samples.to_vec(),
        })
    }

    fn path(&self) -> PathBuf {
        self.info.path.clone()
    }

    /// Hand the pages of the last decoded block back to the kernel so that
    /// resident memory stays flat however large the file is.
    fn release_resident_block(&mut self) {
        if let Some(k) = self.resident_block.take() {
            let block = self.blocks[k];
            // SAFETY: the mapping is read-only and shared, so MADV_DONTNEED
            // cannot change what a later access sees (pages are re-read from
            // the file); no decoded array of this block is alive any more.
            // A failure only costs memory, so it is ignored.
            let _ = unsafe {
                self.mmap.unchecked_advise_range(
                    UncheckedAdvice::DontNeed,
                    block.offset,
                    block.total_len(),
                )
            };
        }
    }
}

/// Page size assumed when handing back the read part of a batch; on a
/// system with larger pages the kernel rounds and less is handed back.
const PAGE: usize = 4096;

impl BatchSource for IpcBatchSource {
    /// A record batch of 65,536 rows x 48 f32 columns is 12.6 MB of mapped
    /// pages, all resident until the batch ends; handing back each column's
    /// read part as the reader goes keeps ~one chunk's worth resident.
    fn consumed(&mut self, batch: &LoadedBatch, rows: usize) {
        let base = self.mmap.as_ptr() as usize;
        let end_of_map = base + self.mmap.len();
        for (start, len) in batch.consumed(rows) {
            // Copied (unaligned) columns live outside the map.
            if len == 0 || start < base || start + len > end_of_map {
                continue;
            }
            let first = (start - base).div_ceil(PAGE) * PAGE;
            let last = (start - base + len) / PAGE * PAGE;
            if last > first {
                // SAFETY: as in `release_resident_block`: a read-only shared
                // mapping re-reads released pages from the file on access.
                let _ = unsafe {
                    self.mmap
                        .unchecked_advise_range(UncheckedAdvice::DontNeed, first, last - first)
                };
            }
        }
    }

    fn info(&self) -> &MatrixInfo {
        &self.info
    }

    fn seek_batch(&mut self, feature_index: u64) -> Result<u64> {
        self.release_resident_block();
        let k = self
            .blocks
            .partition_point(|b| b.first_index + b.rows as u64 <= feature_index);
        self.next_block = k;
        Ok(self
            .blocks
            .get(k)
            .map_or(self.info.n_features, |b| b.first_index))
    }

    fn next_batch(&mut self) -> Result<Option<LoadedBatch>> {
        self.release_resident_block();
        let Some(&block) = self.blocks.get(self.next_block) else {
            return Ok(None);
        };
        let k = self.next_block;
        self.next_block += 1;
        let path = self.path();
        let place = format!(
            "record batch {} of {} (byte {})",
            k + 1,
            self.blocks.len(),
            block.offset
        );
        let data = self
            .whole
            .slice_with_length(block.offset, block.total_len());
        let footer_block = arrow_ipc::Block::new(
            block.offset as i64,
            block.metadata_len as i32,
            block.body_len as i64,
        );
        self.resident_block = Some(k);
        let decoder = &self.decoder;
        let batch = without_panic(
            &path,
            || place.clone(),
            || {
                decoder
                    .read_record_batch(&footer_block, &data)
                    .map_err(|e| corrupt(&path, place.as_str(), e))
            },
        )?
        .ok_or_else(|| corrupt(&path, place.as_str(), "the block holds no record batch"))?;
        if batch.num_rows() != block.rows {
            return Err(corrupt(
                &path,
                place.as_str(),
                format!(
                    "decoded {} rows where the header says {}",
                    batch.num_rows(),
                    block.rows
                ),
            ));
        }
        LoadedBatch::new(
            &path,
            &batch,
            block.first_index,
            &self.info.id_column,
            &self.samples,
        )
        .map(Some)
    }
}

#[cfg(test)]
pub(crate) fn open_for_test(
    path: &Path,
    id_column: &str,
    samples: &[String],
) -> Result<(RowStream<IpcBatchSource>, Arc<Mmap>)> {
    let file = File::open(path).at(path)?;
    // SAFETY: test files are not modified while mapped.
    let mmap = Arc::new(unsafe { Mmap::map(&file) }.at(path)?);
    let source = IpcBatchSource::new(path, mmap.clone(), id_column, samples)?;
    Ok((RowStream::new(source, samples.len()), mmap))
}
