//! The raw archive: every extract's bytes, gzip-compressed, named by the SHA-256 of the bytes
//! as received (`ab/abcdef....gz`), so any snapshot can be parsed again after a mapping fix.
//! Files are written to a temporary name, synced and renamed: a crash never leaves a partial
//! archive file under a real name. Folders are 0700 and files 0600. A large extract is
//! compressed in 4 MiB pieces on two threads, each piece a gzip member of its own (RFC 1952
//! allows a file of several members; `gunzip` and `open` read them as one stream).
//! A writer killed mid-copy leaves its temporary `.incoming-PID-N` file behind;
//! `remove_orphans` deletes those whose process is gone.

use std::fs::{self, File, OpenOptions};
use std::io::{self, BufReader, Read, Write};
use std::os::unix::fs::OpenOptionsExt;
use std::path::{Path, PathBuf};
use std::sync::mpsc;

use flate2::read::MultiGzDecoder;
use flate2::write::GzEncoder;
use sha2::{Digest, Sha256};

/// Bytes per gzip member: deflate's window is 32 KiB, so pieces this large compress as well
/// as one stream does, and two pieces in flight keep memory small.
const MEMBER_BYTES: usize = 4 << 20;

use super::create_private_dir;

/// Name prefix of the temporary file an extract is copied into: `.incoming-PID-NANOS`.
const INCOMING_PREFIX: &str = ".incoming-";

/// Where Linux lists running processes; without it no process can be shown to be gone.
const PROC_DIR: &str = "/proc";

/// An extract as archived.
#[derive(Debug, Clone)]
pub struct Archived {
    pub sha256: String,
    pub bytes: u64,
    pub path: PathBuf,
}

/// Copies `reader` into the archive, hashing as it goes. Archiving the same bytes twice
/// keeps the first file.
pub fn store(archive: &Path, reader: impl Read) -> io::Result<Archived> {
    create_private_dir(archive)?;
    let tmp_path = archive.join(format!("{INCOMING_PREFIX}{}-{}", std::process::id(), unique()));
    let mut tmp = OpenOptions::new().write(true).create_new(true).mode(0o600).open(&tmp_path)?;
    let copied = compress(reader, &mut tmp).and_then(|copied| tmp.sync_all().map(|()| copied));
    let (digest, bytes) = match copied {
        Ok(copied) => copied,
        Err(err) => {
            let _ = fs::remove_file(&tmp_path);
            return Err(err);
        }
    };
    let sha256: String = digest.iter().map(|b| format!("{b:02x}")).collect();
    let path = path_of(archive, &sha256);
    create_private_dir(path.parent().unwrap_or(archive))?;
    if path.exists() {
        fs::remove_file(&tmp_path)?;
    } else {
        fs::rename(&tmp_path, &path)?;
        sync_dir(path.parent().unwrap_or(archive));
    }
    Ok(Archived { sha256, bytes, path })
}

/// Copies `reader` into `out` as gzip members of `MEMBER_BYTES` each, hashing the bytes as
/// they go: every other member is compressed on a helper thread while this thread reads,
/// hashes and compresses the next. The four buffers are reused, so memory stays at a few
/// pieces however large the extract. Returns the SHA-256 and the byte count.
fn compress(mut reader: impl Read, out: &mut File) -> io::Result<([u8; 32], u64)> {
    let mut hasher = Sha256::new();
    let mut bytes = 0u64;
    std::thread::scope(|scope| {
        let (to_helper, jobs) = mpsc::sync_channel::<(Vec<u8>, Vec<u8>)>(1);
        let (from_helper, done) = mpsc::sync_channel::<io::Result<(Vec<u8>, Vec<u8>)>>(1);
        std::thread::Builder::new().name("tidemark-gzip".into()).spawn_scoped(scope, move || {
            for (piece, mut member) in jobs {
                let result = gzip_member(&piece, &mut member).map(|()| (piece, member));
                if from_helper.send(result).is_err() {
                    break;
                }
            }
        })?;
        let (mut a, mut a_member) = (Vec::with_capacity(MEMBER_BYTES), Vec::new());
        let (mut b, mut b_member) = (Vec::with_capacity(MEMBER_BYTES), Vec::new());
        let mut first = true;
        loop {
            read_piece(&mut reader, &mut a)?;
            hasher.update(&a);
            bytes += a.len() as u64;
            // An empty extract is still one (empty) member, as a single stream would be.
            if a.is_empty() && !first {
                break;
            }
            first = false;
            let a_full = a.len() == MEMBER_BYTES;
            to_helper.send((a, a_member)).map_err(|_| helper_stopped())?;
            b.clear();
            if a_full {
                read_piece(&mut reader, &mut b)?;
                hasher.update(&b);
                bytes += b.len() as u64;
            }
            if !b.is_empty() {
                gzip_member(&b, &mut b_member)?;
            }
            (a, a_member) = done.recv().map_err(|_| helper_stopped())??;
            out.write_all(&a_member)?;
            if !b.is_empty() {
                out.write_all(&b_member)?;
            }
            if b.len() < MEMBER_BYTES {
                break;
            }
        }
        Ok::<(), io::Error>(())
    })?;
    Ok((hasher.finalize().into(), bytes))
}

/// Refills `piece` with up to `MEMBER_BYTES` from `reader`: fewer only at the end.
fn read_piece(reader: &mut impl Read, piece: &mut Vec<u8>) -> io::Result<()> {
    piece.resize(MEMBER_BYTES, 0);
    let mut filled = 0;
    while filled < piece.len() {
        match reader.read(&mut piece[filled..]) {
            Ok(0) => break,
            Ok(n) => filled += n,
            Err(err) if err.kind() == io::ErrorKind::Interrupted => continue,
            Err(err) => return Err(err),
        }
    }
    piece.truncate(filled);
    Ok(())
}

/// Compresses `bytes` into `member` as one complete gzip member, at the fast level
/// (archiving is on every ingest's path; the default level is barely better for line lists).
fn gzip_member(bytes: &[u8], member: &mut Vec<u8>) -> io::Result<()> {
    member.clear();
    let mut encoder = GzEncoder::new(std::mem::take(member), flate2::Compression::fast());
    encoder.write_all(bytes)?;
    *member = encoder.finish()?;
    Ok(())
}

fn helper_stopped() -> io::Error {
    io::Error::other("the compressing thread stopped")
}

/// Opens an archived extract; reading yields the original bytes (all members in order).
pub fn open(archive: &Path, sha256: &str) -> io::Result<impl Read> {
    let file = File::open(path_of(archive, sha256))?;
    Ok(MultiGzDecoder::new(BufReader::new(file)))
}

/// Where the bytes with this SHA-256 live.
pub fn path_of(archive: &Path, sha256: &str) -> PathBuf {
    let prefix = sha256.get(..2).unwrap_or("xx");
    archive.join(prefix).join(format!("{sha256}.gz"))
}

/// Removes the temporary files in `archive` that writers killed mid-copy left behind: those
/// named `.incoming-PID-N` whose process is gone, or whose PID is this process's own (a
/// previous run that had the same PID, as a container's daemon often does). Call it before
/// this process archives anything, with the store's writer lock held, so that none of this
/// process's own copies is in progress. A missing archive has nothing to remove. Returns the
/// number of files removed.
pub fn remove_orphans(archive: &Path) -> io::Result<usize> {
    let entries = match fs::read_dir(archive) {
        Ok(entries) => entries,
        Err(err) if err.kind() == io::ErrorKind::NotFound => return Ok(0),
        Err(err) => return Err(err),
    };
    let mut removed = 0;
    for entry in entries {
        let entry = entry?;
        let Some(pid) = entry.file_name().to_str().and_then(incoming_pid) else { continue };
        let is_file = entry.file_type().map(|t| t.is_file()).unwrap_or(false);
        if is_file && writer_gone(pid) {
            match fs::remove_file(entry.path()) {
                Ok(()) => removed += 1,
                Err(err) if err.kind() == io::ErrorKind::NotFound => {}
                Err(err) => return Err(err),
            }
        }
    }
    if removed > 0 {
        sync_dir(archive);
    }
    Ok(removed)
}

/// The writer's PID in a temporary file's name (`.incoming-PID-N`, both decimal), if the name
/// is one.
fn incoming_pid(name: &str) -> Option<u32> {
    let (pid, unique) = name.strip_prefix(INCOMING_PREFIX)?.split_once('-')?;
    let decimal = |t: &str| !t.is_empty() && t.bytes().all(|b| b.is_ascii_digit());
    (decimal(pid) && decimal(unique)).then(|| pid.parse().ok()).flatten()
}

/// Whether the process that wrote a temporary file is gone: it is this process (see
/// `remove_orphans`), or Linux lists no such process. Where processes cannot be listed,
/// every other writer is taken to be alive.
fn writer_gone(pid: u32) -> bool {
    if pid == std::process::id() {
        return true;
    }
    let proc = Path::new(PROC_DIR);
    proc.join("self").exists() && !proc.join(pid.to_string()).exists()
}

fn unique() -> u128 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos())
        .unwrap_or_default()
}

fn sync_dir(dir: &Path) {
    if let Ok(handle) = File::open(dir) {
        let _ = handle.sync_all();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::os::unix::fs::PermissionsExt;

    #[test]
    fn round_trip_is_content_addressed_and_private() {
        let dir = tempfile::tempdir().unwrap();
        let archive = dir.path().join("archive");
        let first = store(&archive, &b"id,onset\n1,2026-03-01\n"[..]).unwrap();
        let again = store(&archive, &b"id,onset\n1,2026-03-01\n"[..]).unwrap();
        assert_eq!(first.sha256, again.sha256);
        assert_eq!(first.bytes, 22);
        // SHA-256 of the bytes, computed independently with `sha256sum`.
        assert_eq!(first.sha256, "b1e3b217a3dc6f257723778178f03d24a29b0a9e61bd286b7c07ccca5e23fda3");
        let mut text = String::new();
        open(&archive, &first.sha256).unwrap().read_to_string(&mut text).unwrap();
        assert_eq!(text, "id,onset\n1,2026-03-01\n");
        let mode = fs::metadata(&first.path).unwrap().permissions().mode() & 0o777;
        assert_eq!(mode, 0o600);
        let dir_mode = fs::metadata(&archive).unwrap().permissions().mode() & 0o777;
        assert_eq!(dir_mode, 0o700);
        let leftovers = fs::read_dir(&archive)
            .unwrap()
            .filter(|e| e.as_ref().unwrap().file_name().to_string_lossy().starts_with(".incoming"));
        assert_eq!(leftovers.count(), 0);
    }

    #[test]
    fn orphaned_temporary_files_of_gone_writers_are_removed() {
        let dir = tempfile::tempdir().unwrap();
        let archive = dir.path().join("archive");
        assert_eq!(remove_orphans(&archive).unwrap(), 0, "no archive yet");
        let kept = store(&archive, &b"id\n1\n"[..]).unwrap();
        // PID 1 is always running on Linux; a PID above the kernel's limit (2^22) never is.
        let gone = u32::MAX - 1;
        let ours = std::process::id();
        let names = [
            (format!(".incoming-{gone}-17"), false),
            (format!(".incoming-{ours}-17"), false),
            (".incoming-1-17".to_string(), true),
            (format!(".incoming-{gone}"), true),
            (format!(".incoming-{gone}-x"), true),
            (format!("incoming-{gone}-17"), true),
            (format!(".incoming--{gone}-17"), true),
        ];
        for (name, _) in &names {
            fs::write(archive.join(name), b"partial").unwrap();
        }
        fs::create_dir(archive.join(format!(".incoming-{gone}-18"))).unwrap();
        assert_eq!(remove_orphans(&archive).unwrap(), 2);
        for (name, stays) in &names {
            assert_eq!(archive.join(name).exists(), *stays, "{name}");
        }
        assert!(archive.join(format!(".incoming-{gone}-18")).is_dir(), "folders are never removed");
        assert!(kept.path.exists(), "archived extracts are never touched");
        assert_eq!(remove_orphans(&archive).unwrap(), 0);
    }

    #[test]
    fn temporary_file_names_carry_the_writer_pid() {
        assert_eq!(incoming_pid(".incoming-123-456"), Some(123));
        assert_eq!(incoming_pid(".incoming-123-"), None);
        assert_eq!(incoming_pid(".incoming--456"), None);
        assert_eq!(incoming_pid(".incoming-+1-456"), None);
        assert_eq!(incoming_pid(".incoming-99999999999-456"), None, "not a PID");
        assert_eq!(incoming_pid("ab"), None);
    }

    #[test]
    fn large_extracts_round_trip_through_several_members() {
        let dir = tempfile::tempdir().unwrap();
        let archive = dir.path().join("archive");
        for len in
            [0, 1, MEMBER_BYTES - 1, MEMBER_BYTES, MEMBER_BYTES + 1, 2 * MEMBER_BYTES, 5 * MEMBER_BYTES + 7]
        {
            let bytes: Vec<u8> = (0..len).map(|i| (i * 7 % 251) as u8).collect();
            let stored = store(&archive, &bytes[..]).unwrap();
            assert_eq!(stored.bytes as usize, len);
            let expected: String = Sha256::digest(&bytes).iter().map(|b| format!("{b:02x}")).collect();
            assert_eq!(stored.sha256, expected, "{len} bytes");
            let mut back = Vec::new();
            open(&archive, &stored.sha256).unwrap().read_to_end(&mut back).unwrap();
            assert!(back == bytes, "{len} bytes do not round-trip");
        }
    }
}
