//! `tidemark backup` and `restore`: a consistent copy while a writer holds the store, a
//! restore refused while the writer runs, and a restore that brings the old state back.

use std::path::Path;

use tidemark::app::ingest::end_of_day;
use tidemark::app::pipeline::ingest_file;
use tidemark::config::Config;
use tidemark::store::{Reader, Store, backup};

fn config(dir: &Path) -> Config {
    let text = "[store]\npath = \"data/t.db\"\narchive = \"data/archive\"\n\
        [[source]]\nname = \"feed\"\nkind = \"folder\"\npath = \"in\"\nkey = \"id\"\n\
        [source.fields]\nonset_date = \"onset\"\n";
    Config::parse(text, &dir.join("t.toml")).unwrap()
}

fn ingest(store: &mut Store, config: &Config, dir: &Path, day: u32, rows: usize) {
    let path = dir.join(format!("e{day}.csv"));
    let mut text = String::from("id,onset\n");
    for idx in 0..rows {
        text.push_str(&format!("C-{idx:04},2026-03-01\n"));
    }
    std::fs::write(&path, text).unwrap();
    let as_of = end_of_day(chrono::NaiveDate::from_ymd_opt(2026, 3, day).unwrap());
    ingest_file(store, config, config.source("feed").unwrap(), &path, Some(as_of)).unwrap();
}

#[test]
fn backup_while_writing_and_restore_when_stopped() {
    let dir = tempfile::tempdir().unwrap();
    let config = config(dir.path());
    let mut store = Store::open(&config.store.path).unwrap();
    ingest(&mut store, &config, dir.path(), 1, 50);
    let copy = dir.path().join("backup.db");
    // The writer is still open (and holds the lock): the online backup works anyway.
    let summary = backup::backup(&config.store.path, &copy).unwrap();
    assert!(summary.bytes > 0);
    assert!(backup::backup(&config.store.path, &copy).is_err(), "never overwrites a backup");
    ingest(&mut store, &config, dir.path(), 2, 80);
    let refused = backup::restore(&copy, &config.store.path).unwrap_err().to_string();
    assert!(refused.contains("is writing to"), "{refused}");
    drop(store);
    backup::restore(&copy, &config.store.path).unwrap();
    let reader = Reader::open(&config.store.path).unwrap();
    let snapshots = reader.snapshots(Some("feed")).unwrap();
    assert_eq!(snapshots.len(), 1, "the state of the backup, before the second extract");
    assert_eq!(snapshots[0].rows_accepted, 50);
    use std::os::unix::fs::PermissionsExt;
    let mode = std::fs::metadata(&copy).unwrap().permissions().mode() & 0o777;
    assert_eq!(mode, 0o600);
}

/// Unix permission bits of a file or folder.
fn mode(path: &Path) -> u32 {
    use std::os::unix::fs::PermissionsExt;
    std::fs::metadata(path).unwrap().permissions().mode() & 0o777
}

/// A backup copied around with mode 0644 (as `cp` under a usual umask leaves it) restores to
/// a store of mode 0600: the store holds patient-level data whatever the copy's mode.
#[test]
fn a_restored_store_is_private_whatever_the_mode_of_the_backup() {
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().unwrap();
    let config = config(dir.path());
    let mut store = Store::open(&config.store.path).unwrap();
    ingest(&mut store, &config, dir.path(), 1, 5);
    drop(store);
    let copy = dir.path().join("copies").join("backup.db");
    backup::backup(&config.store.path, &copy).unwrap();
    assert_eq!(mode(&copy), 0o600);
    assert_eq!(mode(copy.parent().unwrap()), 0o700);
    std::fs::set_permissions(&copy, std::fs::Permissions::from_mode(0o644)).unwrap();
    std::fs::set_permissions(&config.store.path, std::fs::Permissions::from_mode(0o644)).unwrap();
    backup::restore(&copy, &config.store.path).unwrap();
    assert_eq!(mode(&config.store.path), 0o600, "not the backup's 0644");
    let reader = Reader::open(&config.store.path).unwrap();
    assert_eq!(reader.snapshots(Some("feed")).unwrap()[0].rows_accepted, 5);
}
