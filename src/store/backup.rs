//! Online backup and restore. `backup` copies a consistent snapshot of the store through
//! SQLite's backup API from a read-only connection, so it runs while the daemon writes;
//! `restore` takes the writer lock (so no daemon runs), checks the copy, and swaps it in.
//! Both leave a file of mode 0600 whatever the umask and whatever the mode of the file
//! restored from (the store holds patient-level data).

use std::fs::{self, File, OpenOptions, Permissions};
use std::io;
use std::os::unix::fs::PermissionsExt;
use std::path::Path;
use std::time::Duration;

use rusqlite::backup::Backup;
use rusqlite::{Connection, OpenFlags};

use super::{SCHEMA_VERSION, StoreError, create_private_file, lock, open_reader, schema_version};

/// Pages copied per step; small steps let the daemon's writes interleave.
const PAGES_PER_STEP: std::ffi::c_int = 1024;

/// The mode of a backup and of a restored store: owner read and write only.
const PRIVATE_FILE: u32 = 0o600;

/// What a backup copied.
#[derive(Debug, Clone, Copy)]
pub struct BackupSummary {
    pub bytes: u64,
    pub schema_version: i64,
}

/// Writes a consistent copy of `store` to `dest` (which must not exist), mode 0600.
pub fn backup(store: &Path, dest: &Path) -> Result<BackupSummary, StoreError> {
    if dest.exists() {
        return Err(StoreError::Refused(format!("{} exists; not overwriting it", dest.display())));
    }
    let source = open_reader(store)?;
    create_private_file(dest)?;
    let sqlite = |source| StoreError::Sqlite { path: dest.to_path_buf(), source };
    let mut target = Connection::open(dest).map_err(sqlite)?;
    Backup::new(&source, &mut target)
        .and_then(|b| b.run_to_completion(PAGES_PER_STEP, Duration::from_millis(5), None))
        .map_err(sqlite)?;
    target.pragma_update(None, "journal_mode", "DELETE").map_err(sqlite)?;
    check(&target, dest)?;
    let schema_version = schema_version(&target).map_err(sqlite)?;
    drop(target);
    make_private(dest).map_err(|source| StoreError::Create { path: dest.to_path_buf(), source })?;
    Ok(BackupSummary { bytes: fs::metadata(dest).map(|m| m.len()).unwrap_or(0), schema_version })
}

/// Replaces `store` with the backup at `from`. Refused while another process writes.
pub fn restore(from: &Path, store: &Path) -> Result<BackupSummary, StoreError> {
    let _lock = lock::acquire(store)?;
    let sqlite = |source| StoreError::Sqlite { path: from.to_path_buf(), source };
    let copy = Connection::open_with_flags(from, OpenFlags::SQLITE_OPEN_READ_ONLY).map_err(sqlite)?;
    check(&copy, from)?;
    let version = schema_version(&copy).map_err(sqlite)?;
    if version > SCHEMA_VERSION {
        return Err(StoreError::TooNew {
            path: from.to_path_buf(),
            found: version,
            supported: SCHEMA_VERSION,
        });
    }
    drop(copy);
    let staging = store.with_extension("restoring");
    let _ = fs::remove_file(&staging);
    create_private_file(&staging)?;
    let io = |source| StoreError::Create { path: store.to_path_buf(), source };
    copy_private(from, &staging).map_err(io)?;
    for suffix in ["-wal", "-shm"] {
        let mut stale = store.as_os_str().to_os_string();
        stale.push(suffix);
        let _ = fs::remove_file(stale);
    }
    fs::rename(&staging, store).map_err(io)?;
    Ok(BackupSummary { bytes: fs::metadata(store).map(|m| m.len()).unwrap_or(0), schema_version: version })
}

/// Copies `from` over the (existing, empty) file `to`, sets it to 0600 and syncs it.
/// `fs::copy` would give the copy the mode of the file restored from, 0644 or worse.
fn copy_private(from: &Path, to: &Path) -> io::Result<u64> {
    let mut source = File::open(from)?;
    let mut target = OpenOptions::new().write(true).truncate(true).open(to)?;
    target.set_permissions(Permissions::from_mode(PRIVATE_FILE))?;
    let bytes = io::copy(&mut source, &mut target)?;
    target.sync_all()?;
    Ok(bytes)
}

/// Sets `path` to 0600: the file was created so, but a umask may have taken bits away.
fn make_private(path: &Path) -> io::Result<()> {
    fs::set_permissions(path, Permissions::from_mode(PRIVATE_FILE))
}

fn check(conn: &Connection, path: &Path) -> Result<(), StoreError> {
    let result: String = conn
        .query_row("PRAGMA integrity_check", [], |r| r.get(0))
        .map_err(|source| StoreError::Sqlite { path: path.to_path_buf(), source })?;
    if result == "ok" {
        Ok(())
    } else {
        Err(StoreError::Refused(format!("{} fails its integrity check: {result}", path.display())))
    }
}
