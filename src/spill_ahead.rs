//! The spill's records and ids read ahead on their own thread, for the
//! final pass. Its main thread assembles the rows of the results table and
//! waits for their encoding; reading and decoding 80-byte records and their
//! ids there was about a third of its own work (callgrind, 200,000 features),
//! while the second core had nothing to do between row groups. The reading
//! thread fills blocks of a few thousand records (under 1 MB each, at most
//! four in flight, reused), so that memory stays flat in the number of
//! features. With one thread (`--threads 1`) the records are read in place
//! as before.

use std::path::Path;
use std::sync::mpsc::{sync_channel, Receiver, SyncSender};
use std::thread::JoinHandle;

use crate::error::{Result, RiffleError};
use crate::spill::{Record, SpillReader};

/// Records per block handed from the reading thread.
const BLOCK_RECORDS: usize = 2048;

/// Blocks waiting in the channel (one more is being filled, one read).
const BLOCKS_IN_FLIGHT: usize = 2;

#[derive(Default)]
struct Block {
    records: Vec<Record>,
    /// The ids one after another; `ends[i]` is where id i ends.
    ids: String,
    ends: Vec<usize>,
}

impl Block {
    fn clear(&mut self) {
        self.records.clear();
        self.ids.clear();
        self.ends.clear();
    }
}

/// The records of a spill with their ids, in feature order.
pub enum SpillRows {
    Here { reader: SpillReader, id: String },
    Ahead(Ahead),
}

pub struct Ahead {
    blocks: Option<Receiver<Result<Block>>>,
    spare: SyncSender<Block>,
    current: Block,
    next: usize,
    thread: Option<JoinHandle<()>>,
}

impl SpillRows {
    /// `ahead`: read on a thread of its own.
    pub fn open(dir: &Path, ahead: bool) -> Result<Self> {
        let reader = SpillReader::open_unchecked(dir)?;
        if !ahead {
            return Ok(SpillRows::Here {
                reader,
                id: String::new(),
            });
        }
        let (sender, blocks) = sync_channel(BLOCKS_IN_FLIGHT);
        let (spare, spares) = sync_channel(BLOCKS_IN_FLIGHT + 2);
        let thread = std::thread::Builder::new()
            .name("riffle-spill-read".into())
            .spawn(move || read_blocks(reader, sender, spares))
            .map_err(|e| RiffleError::Internal(format!("no thread to read the spill: {e}")))?;
        Ok(SpillRows::Ahead(Ahead {
            blocks: Some(blocks),
            spare,
            current: Block::default(),
            next: 0,
            thread: Some(thread),
        }))
    }

    /// The next record and its id; None after the last.
    pub fn next_row(&mut self) -> Result<Option<(Record, &str)>> {
        match self {
            SpillRows::Here { reader, id } => match reader.next_record()? {
                Some(record) => {
                    reader.next_id(id)?;
                    Ok(Some((record, id.as_str())))
                }
                None => Ok(None),
            },
            SpillRows::Ahead(ahead) => ahead.next_row(),
        }
    }
}

impl Ahead {
    fn next_row(&mut self) -> Result<Option<(Record, &str)>> {
        while self.next == self.current.records.len() {
            let Some(blocks) = &self.blocks else {
                return Ok(None);
            };
            match blocks.recv() {
                Ok(Ok(block)) => {
                    let used = std::mem::replace(&mut self.current, block);
                    // Back to the reading thread; dropped if it is not
                    // waiting for one.
                    let _ = self.spare.try_send(used);
                    self.next = 0;
                }
                Ok(Err(e)) => {
                    self.blocks = None;
                    return Err(e);
                }
                // The reading thread ended: after the last block, or in a
                // panic (which must not pass for the end of the spill).
                Err(_) => {
                    self.blocks = None;
                    if self.thread.take().is_some_and(|t| t.join().is_err()) {
                        return Err(RiffleError::Internal(
                            "the thread reading the spill failed".into(),
                        ));
                    }
                    return Ok(None);
                }
            }
        }
        let i = self.next;
        self.next += 1;
        let start = if i == 0 { 0 } else { self.current.ends[i - 1] };
        Ok(Some((
            self.current.records[i],
            &self.current.ids[start..self.current.ends[i]],
        )))
    }
}

impl Drop for Ahead {
    fn drop(&mut self) {
        // Closing the channel first lets a reading thread blocked on a full
        // channel see that nobody is listening and stop.
        self.blocks = None;
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }
}

fn read_blocks(
    mut reader: SpillReader,
    sender: SyncSender<Result<Block>>,
    spares: Receiver<Block>,
) {
    let mut id = String::new();
    loop {
        let mut block = spares.try_recv().unwrap_or_default();
        block.clear();
        let mut ended = false;
        while block.records.len() < BLOCK_RECORDS {
            let record = match reader.next_record() {
                Ok(Some(record)) => record,
                Ok(None) => {
                    ended = true;
                    break;
                }
                Err(e) => {
                    let _ = sender.send(Err(e));
                    return;
                }
            };
            if let Err(e) = reader.next_id(&mut id) {
                let _ = sender.send(Err(e));
                return;
            }
            block.records.push(record);
            block.ids.push_str(&id);
            block.ends.push(block.ids.len());
        }
        if !block.records.is_empty() && sender.send(Ok(block)).is_err() {
            return;
        }
        if ended {
            return;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spill::{PSource, SpillWriter};
    use crate::stats::prepare::Status;

    fn record(i: u64) -> Record {
        Record {
            effect: i as f64,
            statistic: -(i as f64),
            p_param: 0.5,
            p_perm: 0.25,
            kernel_obs: 1.0,
            p_maxt: f64::NAN,
            exceed: i,
            n_relabel: 9,
            n_a: 3,
            n_b: 4,
            status: Status::Tested,
            source: PSource::Counted,
        }
    }

    /// Read ahead or in place, the same records and ids in the same order,
    /// over several blocks and a partial last one, with empty ids too.
    #[test]
    fn ahead_and_in_place_agree() {
        let dir = tempfile::tempdir().unwrap();
        let n = 3 * BLOCK_RECORDS as u64 + 17;
        let id_of =
            |i: u64| "f".repeat((i % 5) as usize) + &(i % 3).to_string()[(i % 2) as usize..];
        let mut w = SpillWriter::create(dir.path()).unwrap();
        for i in 0..n {
            w.push(&id_of(i), &record(i)).unwrap();
        }
        w.finish().unwrap();
        for ahead in [false, true] {
            let mut rows = SpillRows::open(dir.path(), ahead).unwrap();
            for i in 0..n {
                let (rec, id) = rows.next_row().unwrap().unwrap();
                assert_eq!((rec.exceed, id), (i, id_of(i).as_str()), "ahead {ahead}");
            }
            assert!(rows.next_row().unwrap().is_none());
            assert!(rows.next_row().unwrap().is_none());
        }
    }

    /// Dropped before the end: the reading thread stops (the test would
    /// hang otherwise).
    #[test]
    fn dropped_early_stops_the_reader() {
        let dir = tempfile::tempdir().unwrap();
        let mut w = SpillWriter::create(dir.path()).unwrap();
        for i in 0..(10 * BLOCK_RECORDS as u64) {
            w.push("x", &record(i)).unwrap();
        }
        w.finish().unwrap();
        let mut rows = SpillRows::open(dir.path(), true).unwrap();
        assert_eq!(rows.next_row().unwrap().unwrap().0.exceed, 0);
        drop(rows);
    }
}
