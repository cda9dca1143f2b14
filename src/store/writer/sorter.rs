//! The writer's sorting thread. It decides, row by row and in order, which accepted rows of
//! an extract write a version: from a map of the source's current keys and row hashes, a
//! row whose hash matches its record's current version writes nothing, a new or changed one
//! is sent back to be written, and a key seen again supersedes its earlier row (the last row
//! wins). It also hashes the rows and keeps their raw text in the spill file. Running this on
//! the second core while the writer's thread parses and talks to SQLite is most of what makes
//! a large re-ingest fast. No SQL here: the writer's thread executes the decisions.

use std::collections::HashMap;
use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Write};
use std::os::unix::fs::{FileExt, OpenOptionsExt};
use std::path::{Path, PathBuf};
use std::sync::mpsc::{self, Receiver, Sender, TryRecvError};
use std::thread::JoinHandle;

use super::Plan;
use crate::model::{CaseRecord, ExtractKind};
use crate::store::StoreError;

/// An accepted row on its way to the sorter.
#[derive(Debug)]
pub(super) struct Accepted {
    pub line: u64,
    pub record: CaseRecord,
    pub raw: String,
}

/// What the writer's thread must do for one row, in row order. Rows that change nothing
/// (the usual case on a re-ingest) produce no action at all.
#[derive(Debug)]
pub(super) enum Action {
    /// Write a version of this row: in place of the version an earlier row with the same
    /// key wrote in this extract (`replace`), or as a new one; and close the record's
    /// current version (`close`).
    Write { line: u64, record: CaseRecord, hash: i64, replace: bool, close: Option<i64> },
    /// The row matches the record's current version, but an earlier row with the same key
    /// changed it in this extract: delete that row's version (`replace`) and reopen the
    /// current one (`reopen`).
    Restore { key: Box<str>, replace: bool, reopen: Option<i64> },
}

/// What the sorter knows about one key during an extract.
#[derive(Debug, Clone, Copy, Default)]
struct Entry {
    /// The key's current version before this extract (0: none, the record is new) and its hash.
    prev_id: i64,
    prev_hash: i64,
    /// The line of the last row with this key in this extract (0: not seen yet).
    line: u64,
    /// Where that row's raw text sits in the spill.
    raw: RawRef,
    /// Whether this extract closed `prev_id` (the record changed).
    closed: bool,
    /// Whether the last row with this key wrote a version.
    wrote: bool,
}

/// A row that a later row with the same key superseded.
#[derive(Debug, Clone, Copy)]
struct Superseded {
    line: u64,
    raw: RawRef,
    /// The key's entry.
    entry: u32,
}

/// A superseded row, ready for the `reject` table.
#[derive(Debug, Clone)]
pub(super) struct Rejected {
    pub line: u64,
    /// The line of the row that was kept.
    pub keep_line: u64,
    pub raw: String,
}

/// The sorter's summary once every row has been decided.
#[derive(Debug, Clone, Default)]
pub(super) struct Sorted {
    pub plan: Plan,
    /// Current versions that a full extract no longer contains, ascending.
    pub gone: Vec<i64>,
    /// Superseded rows, by line.
    pub superseded: Vec<Rejected>,
}

/// The decision state of one extract.
#[derive(Debug)]
pub(super) struct Sorter {
    /// Key -> index into `entries`. The map holds only small values, so that it stays
    /// compact: building it for a million keys is mostly cache misses.
    keys: HashMap<Box<str>, u32>,
    entries: Vec<Entry>,
    spill: Spill,
    superseded: Vec<Superseded>,
}

impl Sorter {
    /// An empty sorter with room for `capacity` keys; the spill file goes into `spill_dir`.
    pub fn new(capacity: usize, spill_dir: PathBuf) -> Sorter {
        Sorter {
            keys: HashMap::with_capacity(capacity),
            entries: Vec::with_capacity(capacity),
            spill: Spill::new(spill_dir),
            superseded: Vec::new(),
        }
    }

    /// Registers a current version of the source (before any row is sorted).
    pub fn add_current(&mut self, key: Box<str>, version_id: i64, row_hash: i64) {
        let idx = self.entry_index(key);
        self.entries[idx as usize] = Entry { prev_id: version_id, prev_hash: row_hash, ..Entry::default() };
    }

    /// The index of a new key's entry.
    fn entry_index(&mut self, key: Box<str>) -> u32 {
        let idx = self.entries.len() as u32;
        self.entries.push(Entry::default());
        self.keys.insert(key, idx);
        idx
    }

    /// Decides a batch of rows, in order. A row whose key appeared earlier in the same
    /// batch takes the place of that row's write, which has not reached the database yet:
    /// a duplicate then costs about what a normal row does, instead of a write, a delete of
    /// that write and a second write.
    pub fn sort(&mut self, batch: Vec<Accepted>) -> Result<Vec<Action>, StoreError> {
        let mut actions: Vec<Option<Action>> = Vec::with_capacity(batch.len());
        let mut pending: HashMap<u32, usize> = HashMap::new();
        for row in batch {
            let (idx, action) = self.decide(row, &mut pending, &mut actions)?;
            if let Some(action) = action {
                if matches!(action, Action::Write { .. }) {
                    pending.insert(idx, actions.len());
                }
                actions.push(Some(action));
            }
        }
        Ok(actions.into_iter().flatten().collect())
    }

    fn decide(
        &mut self,
        row: Accepted,
        pending: &mut HashMap<u32, usize>,
        actions: &mut [Option<Action>],
    ) -> Result<(u32, Option<Action>), StoreError> {
        let hash = row.record.row_hash();
        let raw = self.spill.append(row.raw.as_bytes())?;
        let key = row.record.case_key.as_str();
        let idx = match self.keys.get(key) {
            Some(&idx) => idx,
            None => self.entry_index(key.into()),
        };
        let entry = &mut self.entries[idx as usize];
        let mut replace = false;
        if entry.line != 0 {
            self.superseded.push(Superseded { line: entry.line, raw: entry.raw, entry: idx });
            let earlier = pending
                .remove(&idx)
                .and_then(|pos| actions[pos].take_if(|action| matches!(action, Action::Write { .. })));
            match earlier {
                // The earlier write is undone before it is done: what it replaced and
                // whether it closed the previous version pass to this row.
                Some(Action::Write { replace: earlier, close, .. }) => {
                    replace = earlier;
                    if close.is_some() {
                        entry.closed = false;
                    }
                }
                _ => replace = entry.wrote,
            }
            entry.wrote = false;
        }
        entry.line = row.line;
        entry.raw = raw;
        let existed = entry.prev_id != 0;
        if existed && entry.prev_hash == hash {
            let reopen = entry.closed.then_some(entry.prev_id);
            entry.closed = false;
            let restore = replace || reopen.is_some();
            return Ok((idx, restore.then(|| Action::Restore { key: key.into(), replace, reopen })));
        }
        let close = (existed && !entry.closed).then_some(entry.prev_id);
        entry.closed = existed;
        entry.wrote = true;
        Ok((idx, Some(Action::Write { line: row.line, record: row.record, hash, replace, close })))
    }

    /// The plan, the records a full extract removes and the superseded rows with their text.
    pub fn finish(mut self, kind: ExtractKind) -> Result<Sorted, StoreError> {
        let mut sorted = Sorted::default();
        let plan = &mut sorted.plan;
        for entry in &self.entries {
            let seen = entry.line != 0;
            let existed = entry.prev_id != 0;
            plan.current_before += u64::from(existed);
            plan.accepted += u64::from(seen);
            plan.new += u64::from(seen && !existed);
            plan.changed += u64::from(seen && existed && entry.wrote);
            if existed && !seen && kind == ExtractKind::Full {
                sorted.gone.push(entry.prev_id);
            }
        }
        plan.removed = sorted.gone.len() as u64;
        sorted.gone.sort_unstable();
        self.superseded.sort_by_key(|s| s.line);
        for row in std::mem::take(&mut self.superseded) {
            let keep_line = self.entries[row.entry as usize].line;
            let raw = self.spill.read(row.raw)?;
            sorted.superseded.push(Rejected { line: row.line, keep_line, raw });
        }
        Ok(sorted)
    }
}

/// Batches in flight between the two threads before the writer's thread waits: enough to
/// keep both cores busy, few enough that memory stays small (a batch is about 1 MB).
const MAX_IN_FLIGHT: usize = 8;

/// Work for the sorting thread.
#[derive(Debug)]
enum Job {
    /// Current versions of the source: key, version id, row hash. All come before any `Sort`.
    Current(Vec<(Box<str>, i64, i64)>),
    Sort(Vec<Accepted>),
    /// Executed decisions, dropped there: freeing a batch of records is not free, and the
    /// writer's thread is the busy one when most rows are written.
    Discard(Vec<Action>),
}

/// The sorter running on its own thread, fed and drained by the writer's thread.
#[derive(Debug)]
pub(super) struct Pipeline {
    to_sorter: Option<Sender<Job>>,
    from_sorter: Receiver<Result<Vec<Action>, StoreError>>,
    worker: Option<JoinHandle<Sorter>>,
    in_flight: usize,
}

impl Pipeline {
    pub fn start(mut sorter: Sorter) -> Result<Pipeline, StoreError> {
        let (to_sorter, jobs) = mpsc::channel::<Job>();
        let (results, from_sorter) = mpsc::channel();
        let worker = std::thread::Builder::new()
            .name("tidemark-sorter".into())
            .spawn(move || {
                for job in jobs {
                    let batch = match job {
                        Job::Current(versions) => {
                            for (key, version_id, row_hash) in versions {
                                sorter.add_current(key, version_id, row_hash);
                            }
                            continue;
                        }
                        Job::Sort(batch) => batch,
                        Job::Discard(actions) => {
                            drop(actions);
                            continue;
                        }
                    };
                    let result = sorter.sort(batch);
                    let failed = result.is_err();
                    if results.send(result).is_err() || failed {
                        break;
                    }
                }
                sorter
            })
            .map_err(|err| StoreError::Refused(format!("cannot start the sorting thread: {err}")))?;
        Ok(Pipeline { to_sorter: Some(to_sorter), from_sorter, worker: Some(worker), in_flight: 0 })
    }

    /// Hands a batch to the sorter; the decisions come back through `next`.
    pub fn send(&mut self, batch: Vec<Accepted>) -> Result<(), StoreError> {
        let sent = self.to_sorter.as_ref().map(|to| to.send(Job::Sort(batch)).is_ok()).unwrap_or(false);
        if !sent {
            return Err(self.worker_failed());
        }
        self.in_flight += 1;
        Ok(())
    }

    /// Hands the sorter current versions of the source (before any batch is sent).
    pub fn add_current(&self, versions: Vec<(Box<str>, i64, i64)>) -> Result<(), StoreError> {
        let sent = self.to_sorter.as_ref().map(|to| to.send(Job::Current(versions)).is_ok()).unwrap_or(false);
        if sent { Ok(()) } else { Err(self.worker_failed()) }
    }

    /// Hands executed decisions back to be dropped on the sorting thread.
    pub fn discard(&self, actions: Vec<Action>) {
        if let Some(to) = &self.to_sorter {
            // If the thread has stopped, the actions are simply dropped here.
            let _ = to.send(Job::Discard(actions));
        }
    }

    /// The decisions of the oldest batch in flight: waits for them if `wait` or if too many
    /// batches are in flight, else `None` when they are not ready yet.
    pub fn next(&mut self, wait: bool) -> Option<Result<Vec<Action>, StoreError>> {
        if self.in_flight == 0 {
            return None;
        }
        let received = if wait || self.in_flight > MAX_IN_FLIGHT {
            self.from_sorter.recv().map_err(|_| TryRecvError::Disconnected)
        } else {
            self.from_sorter.try_recv()
        };
        match received {
            Ok(result) => {
                self.in_flight -= 1;
                Some(result)
            }
            Err(TryRecvError::Empty) => None,
            Err(TryRecvError::Disconnected) => {
                self.in_flight = 0;
                Some(Err(self.worker_failed()))
            }
        }
    }

    /// Stops the thread once every batch has been drained and returns the sorter.
    pub fn finish(mut self) -> Result<Sorter, StoreError> {
        self.to_sorter = None;
        let worker = self.worker.take().ok_or_else(|| self.worker_failed())?;
        worker.join().map_err(|_| StoreError::Refused("the sorting thread panicked".into()))
    }

    fn worker_failed(&self) -> StoreError {
        StoreError::Refused("the sorting thread stopped unexpectedly".into())
    }
}

impl Drop for Pipeline {
    fn drop(&mut self) {
        // An abandoned ingest: let the thread run out of work and end before the rollback.
        self.to_sorter = None;
        if let Some(worker) = self.worker.take() {
            let _ = worker.join();
        }
    }
}

/// Where a row's raw text sits in the spill.
#[derive(Debug, Clone, Copy, Default)]
struct RawRef {
    at: u64,
    len: u32,
}

/// The raw text of every accepted row, appended to an unnamed file in the store's folder
/// (mode 0600, never linked into the folder, so it vanishes with the process however that
/// ends). Only rows superseded by a later duplicate are read back. Keeping the text in
/// memory or in a SQLite table instead costs far more for a large extract.
#[derive(Debug)]
struct Spill {
    dir: PathBuf,
    file: Option<BufWriter<File>>,
    len: u64,
}

/// Write buffer of the spill file: large sequential writes, few system calls.
const SPILL_BUFFER_BYTES: usize = 256 * 1024;

impl Spill {
    fn new(dir: PathBuf) -> Spill {
        Spill { dir, file: None, len: 0 }
    }

    fn append(&mut self, bytes: &[u8]) -> Result<RawRef, StoreError> {
        if self.file.is_none() {
            let file = unnamed_file(&self.dir).map_err(|err| self.error(err))?;
            self.file = Some(BufWriter::with_capacity(SPILL_BUFFER_BYTES, file));
        }
        let at = self.len;
        if let Some(Err(err)) = self.file.as_mut().map(|file| file.write_all(bytes)) {
            return Err(self.error(err));
        }
        self.len += bytes.len() as u64;
        Ok(RawRef { at, len: bytes.len() as u32 })
    }

    fn read(&mut self, raw: RawRef) -> Result<String, StoreError> {
        let Some(file) = self.file.as_mut() else { return Ok(String::new()) };
        let mut bytes = vec![0; raw.len as usize];
        let result = file.flush().and_then(|()| file.get_ref().read_exact_at(&mut bytes, raw.at));
        result.map_err(|err| self.error(err))?;
        Ok(String::from_utf8(bytes)
            .unwrap_or_else(|err| String::from_utf8_lossy(err.as_bytes()).into_owned()))
    }

    fn error(&self, source: std::io::Error) -> StoreError {
        StoreError::Create { path: self.dir.join("(unnamed spill file)"), source }
    }
}

/// An unnamed read-write file in `dir`: `O_TMPFILE` where the file system has it, else a
/// private file removed right after it is opened.
fn unnamed_file(dir: &Path) -> std::io::Result<File> {
    #[cfg(target_os = "linux")]
    {
        let mut options = OpenOptions::new();
        options.read(true).write(true).mode(0o600).custom_flags(libc::O_TMPFILE);
        if let Ok(file) = options.open(dir) {
            return Ok(file);
        }
    }
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos())
        .unwrap_or_default();
    let path = dir.join(format!(".tidemark-spill-{}-{nanos}", std::process::id()));
    let file = OpenOptions::new().read(true).write(true).create_new(true).mode(0o600).open(&path)?;
    std::fs::remove_file(&path)?;
    Ok(file)
}
