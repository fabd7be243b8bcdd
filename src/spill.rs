//! Spill stage: per-feature results on disk as they are produced, so that
//! nothing downstream needs all features in memory.
//!
//! A spill is a folder with two files:
//! - `records.bin`: a 32-byte header (magic, version, record size, reserved),
//!   then one fixed-width little-endian [`Record`] per feature in feature
//!   order, then a 16-byte trailer (record count u64, CRC-32 of all record
//!   bytes u32, magic `RFEN`).
//! - `ids.bin`: the same header, then per feature a u32 byte length and the
//!   UTF-8 id, then the same kind of trailer over the id bytes.
//!
//! Both are written under temporary names and renamed when complete.

use std::fs::File;
use std::io::{BufRead, BufReader, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use crate::error::{IoContext, Result, RiffleError};
use crate::stats::prepare::Status;

pub const RECORDS_FILE: &str = "records.bin";
pub const IDS_FILE: &str = "ids.bin";
const MAGIC: &[u8; 8] = b"RIFSPILL";
const VERSION: u32 = 1;
const HEADER_LEN: u64 = 32;
const TRAILER_LEN: u64 = 16;
const TRAILER_MAGIC: &[u8; 4] = b"RFEN";
pub const RECORD_LEN: usize = 80;

/// Where a feature's permutation p-value came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u8)]
pub enum PSource {
    /// (b + 1) / (B + 1) from sampled relabelings.
    Counted = 0,
    /// Every distinct relabelling enumerated.
    Exact = 1,
    /// h / L: sequential stopping at the h-th exceedance after L
    /// relabelings (Besag & Clifford 1991).
    Sequential = 2,
    /// Extrapolated from a generalized Pareto fit to the feature's largest
    /// relabelled statistics (`crate::tail`); `exceed` keeps the count.
    Tail = 3,
    /// Phipson & Smyth (2010) exact p for B draws with replacement from a
    /// space of m_t distinct relabelings.
    PhipsonSmyth = 4,
}

impl PSource {
    pub fn name(self) -> &'static str {
        match self {
            PSource::Counted => "counted",
            PSource::Exact => "exact",
            PSource::Sequential => "sequential",
            PSource::PhipsonSmyth => "phipson-smyth",
            PSource::Tail => "tail",
        }
    }
    fn from_code(code: u8) -> Option<Self> {
        match code {
            0 => Some(PSource::Counted),
            1 => Some(PSource::Exact),
            2 => Some(PSource::Sequential),
            3 => Some(PSource::Tail),
            4 => Some(PSource::PhipsonSmyth),
            _ => None,
        }
    }
}

#[derive(Debug, Clone, Copy)]
pub struct Record {
    pub effect: f64,
    pub statistic: f64,
    pub p_param: f64,
    pub p_perm: f64,
    pub kernel_obs: f64,
    /// Step-down maxT adjusted p-value (NaN when not computed).
    pub p_maxt: f64,
    pub exceed: u64,
    pub n_relabel: u64,
    pub n_a: u32,
    pub n_b: u32,
    pub status: Status,
    pub source: PSource,
}

impl Record {
    fn encode(&self, out: &mut [u8; RECORD_LEN]) {
        out[0..8].copy_from_slice(&self.effect.to_le_bytes());
        out[8..16].copy_from_slice(&self.statistic.to_le_bytes());
        out[16..24].copy_from_slice(&self.p_param.to_le_bytes());
        out[24..32].copy_from_slice(&self.p_perm.to_le_bytes());
        out[32..40].copy_from_slice(&self.kernel_obs.to_le_bytes());
        out[40..48].copy_from_slice(&self.exceed.to_le_bytes());
        out[48..56].copy_from_slice(&self.n_relabel.to_le_bytes());
        out[56..60].copy_from_slice(&self.n_a.to_le_bytes());
        out[60..64].copy_from_slice(&self.n_b.to_le_bytes());
        out[64] = self.status as u8;
        out[65] = self.source as u8;
        out[66..72].fill(0);
        out[72..80].copy_from_slice(&self.p_maxt.to_le_bytes());
    }

    fn decode(b: &[u8; RECORD_LEN]) -> Option<Self> {
        let f = |i: usize| f64::from_le_bytes(b[i..i + 8].try_into().unwrap());
        let u = |i: usize| u64::from_le_bytes(b[i..i + 8].try_into().unwrap());
        let w = |i: usize| u32::from_le_bytes(b[i..i + 4].try_into().unwrap());
        Some(Record {
            effect: f(0),
            statistic: f(8),
            p_param: f(16),
            p_perm: f(24),
            kernel_obs: f(32),
            p_maxt: f(72),
            exceed: u(40),
            n_relabel: u(48),
            n_a: w(56),
            n_b: w(60),
            status: Status::from_code(b[64])?,
            source: PSource::from_code(b[65])?,
        })
    }
}

struct CheckedWriter {
    final_path: PathBuf,
    temp_path: PathBuf,
    out: BufWriter<File>,
    crc: crc32fast::Hasher,
    count: u64,
    /// Bytes written so far, header included.
    len: u64,
}

/// The fixed temporary name of a resumable spill file.
fn stable_temp_name(path: &Path) -> PathBuf {
    let mut name = path.file_name().unwrap_or_default().to_os_string();
    name.push(".partial");
    path.with_file_name(name)
}

impl CheckedWriter {
    fn create(final_path: PathBuf) -> Result<Self> {
        let temp_path = temp_name(&final_path);
        Self::create_at(final_path, temp_path)
    }

    fn create_at(final_path: PathBuf, temp_path: PathBuf) -> Result<Self> {
        let file = File::create(&temp_path).at(&temp_path)?;
        let mut out = BufWriter::with_capacity(1 << 20, file);
        let mut header = [0u8; HEADER_LEN as usize];
        header[0..8].copy_from_slice(MAGIC);
        header[8..12].copy_from_slice(&VERSION.to_le_bytes());
        header[12..16].copy_from_slice(&(RECORD_LEN as u32).to_le_bytes());
        out.write_all(&header).at(&temp_path)?;
        Ok(CheckedWriter {
            final_path,
            temp_path,
            out,
            crc: crc32fast::Hasher::new(),
            count: 0,
            len: HEADER_LEN,
        })
    }

    /// Reopens a resumable file cut back to `committed_len` bytes; the
    /// checksum state cannot be stored, so it is recomputed over the kept
    /// body.
    fn resume(final_path: PathBuf, committed_len: u64, count: u64) -> Result<Self> {
        let temp_path = stable_temp_name(&final_path);
        let bad = |msg: String| RiffleError::bad_input(&temp_path, "checkpoint", msg);
        let mut file = std::fs::OpenOptions::new()
            .read(true)
            .write(true)
            .open(&temp_path)
            .at(&temp_path)?;
        let len = file.metadata().at(&temp_path)?.len();
        if len < committed_len || committed_len < HEADER_LEN {
            return Err(bad(format!(
                "{len} bytes, but the checkpoint committed {committed_len}"
            )));
        }
        file.set_len(committed_len).at(&temp_path)?;
        let mut header = [0u8; HEADER_LEN as usize];
        file.read_exact(&mut header).at(&temp_path)?;
        if &header[0..8] != MAGIC {
            return Err(bad("not a riffle spill file (wrong magic bytes)".into()));
        }
        let mut crc = crc32fast::Hasher::new();
        let mut reader =
            BufReader::with_capacity(1 << 20, &mut file).take(committed_len - HEADER_LEN);
        let mut buf = vec![0u8; 1 << 20];
        loop {
            let k = reader.read(&mut buf).at(&temp_path)?;
            if k == 0 {
                break;
            }
            crc.update(&buf[..k]);
        }
        file.seek(SeekFrom::Start(committed_len)).at(&temp_path)?;
        Ok(CheckedWriter {
            final_path,
            temp_path,
            out: BufWriter::with_capacity(1 << 20, file),
            crc,
            count,
            len: committed_len,
        })
    }

    /// Flushes and syncs what was written; returns the committed length.
    fn commit(&mut self) -> Result<u64> {
        self.out.flush().at(&self.temp_path)?;
        self.out.get_ref().sync_data().at(&self.temp_path)?;
        Ok(self.len)
    }

    fn write(&mut self, bytes: &[u8]) -> Result<()> {
        self.crc.update(bytes);
        self.len += bytes.len() as u64;
        self.out.write_all(bytes).at(&self.temp_path)
    }

    fn finish(mut self) -> Result<()> {
        let crc = std::mem::take(&mut self.crc).finalize();
        let mut trailer = [0u8; TRAILER_LEN as usize];
        trailer[0..8].copy_from_slice(&self.count.to_le_bytes());
        trailer[8..12].copy_from_slice(&crc.to_le_bytes());
        trailer[12..16].copy_from_slice(TRAILER_MAGIC);
        self.out.write_all(&trailer).at(&self.temp_path)?;
        let file = self
            .out
            .into_inner()
            .map_err(|e| RiffleError::io(&self.temp_path, e.into_error()))?;
        file.sync_all().at(&self.temp_path)?;
        std::fs::rename(&self.temp_path, &self.final_path).at(&self.final_path)
    }
}

pub fn temp_name(path: &Path) -> PathBuf {
    let mut name = path.file_name().unwrap_or_default().to_os_string();
    name.push(format!(".partial-{}", std::process::id()));
    path.with_file_name(name)
}

/// Appends records and ids in feature order.
pub struct SpillWriter {
    records: CheckedWriter,
    ids: CheckedWriter,
}

impl SpillWriter {
    pub fn create(dir: &Path) -> Result<Self> {
        std::fs::create_dir_all(dir).at(dir)?;
        Ok(SpillWriter {
            records: CheckedWriter::create(dir.join(RECORDS_FILE))?,
            ids: CheckedWriter::create(dir.join(IDS_FILE))?,
        })
    }

    /// Like `create`, under fixed temporary names that a later process can
    /// find again (see `crate::resume`).
    pub fn create_resumable(dir: &Path) -> Result<Self> {
        std::fs::create_dir_all(dir).at(dir)?;
        let file = |name: &str| {
            let path = dir.join(name);
            CheckedWriter::create_at(path.clone(), stable_temp_name(&path))
        };
        Ok(SpillWriter {
            records: file(RECORDS_FILE)?,
            ids: file(IDS_FILE)?,
        })
    }

    /// Continues a resumable spill from a commit (`commit`'s lengths).
    pub fn resume(dir: &Path, records_len: u64, ids_len: u64, count: u64) -> Result<Self> {
        Ok(SpillWriter {
            records: CheckedWriter::resume(dir.join(RECORDS_FILE), records_len, count)?,
            ids: CheckedWriter::resume(dir.join(IDS_FILE), ids_len, count)?,
        })
    }

    /// Makes everything pushed so far durable; returns (records bytes, ids
    /// bytes, count) for `resume`.
    pub fn commit(&mut self) -> Result<(u64, u64, u64)> {
        Ok((
            self.records.commit()?,
            self.ids.commit()?,
            self.records.count,
        ))
    }

    pub fn count(&self) -> u64 {
        self.records.count
    }

    /// Completes a resumable spill whose last commit covered everything:
    /// each file still under its temporary name gets its trailer and is
    /// renamed; one already renamed is left as it is.
    pub fn finish_committed(dir: &Path, records_len: u64, ids_len: u64, count: u64) -> Result<()> {
        for (name, len) in [(RECORDS_FILE, records_len), (IDS_FILE, ids_len)] {
            let path = dir.join(name);
            if stable_temp_name(&path).is_file() {
                CheckedWriter::resume(path, len, count)?.finish()?;
            } else if !path.is_file() {
                return Err(RiffleError::bad_input(
                    &path,
                    "checkpoint",
                    "the spill file named by the checkpoint is missing",
                ));
            }
        }
        Ok(())
    }

    pub fn push(&mut self, id: &str, record: &Record) -> Result<()> {
        let mut buf = [0u8; RECORD_LEN];
        record.encode(&mut buf);
        self.records.write(&buf)?;
        self.records.count += 1;
        self.ids.write(&(id.len() as u32).to_le_bytes())?;
        self.ids.write(id.as_bytes())?;
        self.ids.count += 1;
        Ok(())
    }

    pub fn finish(self) -> Result<()> {
        self.records.finish()?;
        self.ids.finish()
    }
}

/// Rewrites every record of a spill in place (through a temporary file),
/// in feature order; ids are left as they are.
pub fn rewrite_records(
    dir: &Path,
    update: &mut dyn FnMut(u64, &mut Record) -> Result<()>,
) -> Result<()> {
    let mut reader = SpillReader::open_unchecked(dir)?;
    let mut writer = CheckedWriter::create(dir.join(RECORDS_FILE))?;
    let mut index = 0u64;
    let mut buf = [0u8; RECORD_LEN];
    while let Some(mut record) = reader.next_record()? {
        update(index, &mut record)?;
        record.encode(&mut buf);
        writer.write(&buf)?;
        writer.count += 1;
        index += 1;
    }
    writer.finish()
}

/// Validates a spill file's header and trailer (count and checksum).
fn check_file(path: &Path, expect_record_len: bool) -> Result<u64> {
    let bad = |place: &str, msg: &str| RiffleError::bad_input(path, place, msg.to_string());
    let mut file = File::open(path).at(path)?;
    let len = file.metadata().at(path)?.len();
    if len < HEADER_LEN + TRAILER_LEN {
        return Err(bad("header", "too short to be a riffle spill file"));
    }
    let mut header = [0u8; HEADER_LEN as usize];
    file.read_exact(&mut header).at(path)?;
    if &header[0..8] != MAGIC {
        return Err(bad("header", "not a riffle spill file (wrong magic bytes)"));
    }
    let version = u32::from_le_bytes(header[8..12].try_into().unwrap());
    if version != VERSION {
        return Err(bad(
            "header",
            &format!("spill version {version}, this riffle reads version {VERSION}"),
        ));
    }
    let record_len = u32::from_le_bytes(header[12..16].try_into().unwrap()) as usize;
    if record_len != RECORD_LEN {
        return Err(bad(
            "header",
            &format!("record size {record_len}, expected {RECORD_LEN}"),
        ));
    }
    file.seek(SeekFrom::Start(len - TRAILER_LEN)).at(path)?;
    let mut trailer = [0u8; TRAILER_LEN as usize];
    file.read_exact(&mut trailer).at(path)?;
    if &trailer[12..16] != TRAILER_MAGIC {
        return Err(bad("trailer", "incomplete spill file (no end marker)"));
    }
    let count = u64::from_le_bytes(trailer[0..8].try_into().unwrap());
    let stored_crc = u32::from_le_bytes(trailer[8..12].try_into().unwrap());
    let body = len - HEADER_LEN - TRAILER_LEN;
    // checked_mul: a corrupted count must not overflow (found by fuzzing).
    if expect_record_len && count.checked_mul(RECORD_LEN as u64) != Some(body) {
        return Err(bad(
            "trailer",
            &format!("{count} records announced but {body} bytes of records present"),
        ));
    }
    file.seek(SeekFrom::Start(HEADER_LEN)).at(path)?;
    let mut crc = crc32fast::Hasher::new();
    let mut reader = BufReader::with_capacity(1 << 20, file).take(body);
    let mut buf = vec![0u8; 1 << 20];
    loop {
        let k = reader.read(&mut buf).at(path)?;
        if k == 0 {
            break;
        }
        crc.update(&buf[..k]);
    }
    if crc.finalize() != stored_crc {
        return Err(bad(
            "body",
            "checksum mismatch: the spill file is corrupted",
        ));
    }
    Ok(count)
}

/// Reads a spill back in feature order.
pub struct SpillReader {
    records_path: PathBuf,
    ids_path: PathBuf,
    records: std::io::Take<BufReader<File>>,
    ids: std::io::Take<BufReader<File>>,
    pub count: u64,
    read: u64,
}

impl SpillReader {
    /// Opens and verifies both files (a full checksum pass).
    pub fn open(dir: &Path) -> Result<Self> {
        let records_path = dir.join(RECORDS_FILE);
        let ids_path = dir.join(IDS_FILE);
        let count = check_file(&records_path, true)?;
        let id_count = check_file(&ids_path, false)?;
        if id_count != count {
            return Err(RiffleError::bad_input(
                &ids_path,
                "trailer",
                format!("{id_count} ids for {count} records"),
            ));
        }
        let mut reader = Self::open_unchecked(dir)?;
        reader.count = count;
        Ok(reader)
    }

    /// Opens without verifying; for second and later passes.
    pub fn open_unchecked(dir: &Path) -> Result<Self> {
        let records_path = dir.join(RECORDS_FILE);
        let ids_path = dir.join(IDS_FILE);
        let open = |p: &Path| -> Result<std::io::Take<BufReader<File>>> {
            let mut f = File::open(p).at(p)?;
            let len = f.metadata().at(p)?.len();
            f.seek(SeekFrom::Start(HEADER_LEN)).at(p)?;
            Ok(BufReader::with_capacity(1 << 20, f)
                .take(len.saturating_sub(HEADER_LEN + TRAILER_LEN)))
        };
        let records = open(&records_path)?;
        let count = records.limit() / RECORD_LEN as u64;
        Ok(SpillReader {
            ids: open(&ids_path)?,
            records,
            records_path,
            ids_path,
            count,
            read: 0,
        })
    }

    pub fn next_record(&mut self) -> Result<Option<Record>> {
        if self.read == self.count {
            return Ok(None);
        }
        let mut buf = [0u8; RECORD_LEN];
        // Straight from the buffer when a whole record is in it: the final
        // pass reads the spill several times, and `read_exact` through
        // `Take` showed in its profile.
        let whole = match self.records.fill_buf().at(&self.records_path)? {
            avail if avail.len() >= RECORD_LEN => {
                buf.copy_from_slice(&avail[..RECORD_LEN]);
                true
            }
            _ => false,
        };
        if whole {
            self.records.consume(RECORD_LEN);
        } else {
            self.records.read_exact(&mut buf).at(&self.records_path)?;
        }
        self.read += 1;
        Record::decode(&buf).map(Some).ok_or_else(|| {
            RiffleError::bad_input(
                &self.records_path,
                format!("record {}", self.read),
                "unknown status or source code",
            )
        })
    }

    pub fn next_id(&mut self, id: &mut String) -> Result<()> {
        let mut len = [0u8; 4];
        self.ids.read_exact(&mut len).at(&self.ids_path)?;
        let len = u32::from_le_bytes(len) as u64;
        // A corrupted length must not become a 4 GB allocation.
        if len > self.ids.limit() {
            return Err(RiffleError::bad_input(
                &self.ids_path,
                format!("id {}", self.read),
                format!(
                    "an id of {len} bytes is announced but only {} bytes remain",
                    self.ids.limit()
                ),
            ));
        }
        // Read into the caller's string buffer: no allocation per id.
        let mut bytes = std::mem::take(id).into_bytes();
        bytes.clear();
        bytes.resize(len as usize, 0);
        self.ids.read_exact(&mut bytes).at(&self.ids_path)?;
        *id = String::from_utf8(bytes).map_err(|_| {
            RiffleError::bad_input(&self.ids_path, format!("id {}", self.read), "not UTF-8")
        })?;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn record(i: u64) -> Record {
        Record {
            effect: i as f64 * 0.5,
            statistic: -(i as f64),
            p_param: 0.01,
            p_perm: (i + 1) as f64 / 100.0,
            kernel_obs: 1.5,
            p_maxt: f64::NAN,
            exceed: i,
            n_relabel: 99,
            n_a: 4,
            n_b: 5,
            status: if i.is_multiple_of(7) {
                Status::Constant
            } else {
                Status::Tested
            },
            source: PSource::Counted,
        }
    }

    #[test]
    fn round_trip_and_corruption_detected() {
        let dir = tempfile::tempdir().unwrap();
        let mut w = SpillWriter::create(dir.path()).unwrap();
        for i in 0..1000 {
            w.push(&format!("feat{i}"), &record(i)).unwrap();
        }
        w.finish().unwrap();
        let mut r = SpillReader::open(dir.path()).unwrap();
        assert_eq!(r.count, 1000);
        let mut id = String::new();
        for i in 0..1000 {
            let rec = r.next_record().unwrap().unwrap();
            r.next_id(&mut id).unwrap();
            assert_eq!(id, format!("feat{i}"));
            assert_eq!(rec.exceed, i);
            assert_eq!(rec.status, record(i).status);
        }
        assert!(r.next_record().unwrap().is_none());

        let path = dir.path().join(RECORDS_FILE);
        let mut bytes = std::fs::read(&path).unwrap();
        bytes[100] ^= 0xff;
        std::fs::write(&path, &bytes).unwrap();
        let e = SpillReader::open(dir.path()).err().unwrap().to_string();
        assert!(e.contains("checksum"), "{e}");
        bytes.truncate(bytes.len() - 5);
        std::fs::write(&path, &bytes).unwrap();
        let e = SpillReader::open(dir.path()).err().unwrap().to_string();
        assert!(e.contains("incomplete") || e.contains("announced"), "{e}");
    }

    /// More records than the reader's 1 MiB buffer holds (80-byte records
    /// straddle its refills) and ids of every length from empty to longer
    /// than a record: each comes back whole and in order.
    #[test]
    fn records_and_ids_straddling_buffer_refills() {
        let dir = tempfile::tempdir().unwrap();
        let mut w = SpillWriter::create(dir.path()).unwrap();
        let id_of = |i: u64| "x".repeat((i % 97) as usize) + &i.to_string()[..(i % 2) as usize];
        let n = 30_000u64;
        for i in 0..n {
            w.push(&id_of(i), &record(i)).unwrap();
        }
        w.finish().unwrap();
        let mut r = SpillReader::open(dir.path()).unwrap();
        let mut id = String::new();
        for i in 0..n {
            let rec = r.next_record().unwrap().unwrap();
            r.next_id(&mut id).unwrap();
            assert_eq!(id, id_of(i));
            assert_eq!((rec.exceed, rec.effect), (i, i as f64 * 0.5));
        }
        assert!(r.next_record().unwrap().is_none());
    }
}
