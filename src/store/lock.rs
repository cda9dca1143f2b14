//! The writer lock: one process at a time may write to a store. It is an advisory lock
//! (`flock`) on a file beside the store, so the kernel releases it when the process dies,
//! however it dies. The file also records the holder's pid for error messages.

use std::fs::{File, OpenOptions};
use std::io::{Read, Seek, SeekFrom, Write};
use std::os::unix::fs::OpenOptionsExt;
use std::path::{Path, PathBuf};

use super::StoreError;

/// Held for as long as the value lives.
#[derive(Debug)]
pub struct WriterLock {
    _file: File,
    path: PathBuf,
}

impl WriterLock {
    pub fn path(&self) -> &Path {
        &self.path
    }
}

impl Drop for WriterLock {
    /// Unlocks explicitly: a child process forked at this moment may still share the open
    /// file until it execs, and closing our descriptor alone would leave the lock held.
    fn drop(&mut self) {
        let _ = self._file.unlock();
    }
}

/// The lock file of a store.
pub fn lock_path(store: &Path) -> PathBuf {
    let mut name = store.file_name().unwrap_or_default().to_os_string();
    name.push(".lock");
    store.with_file_name(name)
}

/// Takes the writer lock, or says which process holds it.
pub fn acquire(store: &Path) -> Result<WriterLock, StoreError> {
    let path = lock_path(store);
    let create = |source| StoreError::Create { path: path.clone(), source };
    if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
        super::create_private_dir(parent).map_err(create)?;
    }
    let mut file = OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(false)
        .mode(0o600)
        .open(&path)
        .map_err(create)?;
    match file.try_lock() {
        Ok(()) => {}
        Err(std::fs::TryLockError::WouldBlock) => {
            let holder = holder_pid(&mut file).map(|pid| format!(" (pid {pid})")).unwrap_or_default();
            return Err(StoreError::Locked(format!(
                "another tidemark process{holder} is writing to {}; stop it or wait for it to finish",
                store.display()
            )));
        }
        Err(std::fs::TryLockError::Error(err)) => return Err(create(err)),
    }
    file.set_len(0).map_err(create)?;
    file.seek(SeekFrom::Start(0)).map_err(create)?;
    write!(file, "{}", std::process::id()).map_err(create)?;
    Ok(WriterLock { _file: file, path })
}

/// The pid of a running writer, if the lock is held (for `tidemark status`).
pub fn holder(store: &Path) -> Option<u32> {
    let mut file = File::open(lock_path(store)).ok()?;
    match file.try_lock_shared() {
        Ok(()) => None,
        Err(_) => holder_pid(&mut file),
    }
}

fn holder_pid(file: &mut File) -> Option<u32> {
    let mut text = String::new();
    file.seek(SeekFrom::Start(0)).ok()?;
    file.read_to_string(&mut text).ok()?;
    text.trim().parse().ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn second_writer_is_refused_until_the_first_is_dropped() {
        let dir = tempfile::tempdir().unwrap();
        let store = dir.path().join("t.db");
        let first = acquire(&store).unwrap();
        let err = acquire(&store).unwrap_err().to_string();
        assert!(err.contains(&format!("pid {}", std::process::id())), "{err}");
        assert_eq!(holder(&store), Some(std::process::id()));
        drop(first);
        assert_eq!(holder(&store), None);
        acquire(&store).unwrap();
    }
}
