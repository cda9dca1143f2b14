//! The raw archive: every extract's bytes, gzip-compressed, named by the SHA-256 of the bytes
//! as received (`ab/abcdef....gz`), so any snapshot can be parsed again after a mapping fix.
//! Files are written to a temporary name, synced and renamed: a crash never leaves a partial
//! archive file under a real name. Folders are 0700 and files 0600.

use std::fs::{self, File, OpenOptions};
use std::io::{self, BufReader, Read, Write};
use std::os::unix::fs::OpenOptionsExt;
use std::path::{Path, PathBuf};

use flate2::read::GzDecoder;
use flate2::write::GzEncoder;
use sha2::{Digest, Sha256};

use super::create_private_dir;

/// An extract as archived.
#[derive(Debug, Clone)]
pub struct Archived {
    pub sha256: String,
    pub bytes: u64,
    pub path: PathBuf,
}

/// Copies `reader` into the archive, hashing as it goes. Archiving the same bytes twice
/// keeps the first file.
pub fn store(archive: &Path, mut reader: impl Read) -> io::Result<Archived> {
    create_private_dir(archive)?;
    let tmp_path = archive.join(format!(".incoming-{}-{}", std::process::id(), unique()));
    let tmp = OpenOptions::new().write(true).create_new(true).mode(0o600).open(&tmp_path)?;
    let mut encoder = GzEncoder::new(tmp, flate2::Compression::fast());
    let mut hasher = Sha256::new();
    let mut buffer = vec![0u8; 256 * 1024];
    let mut bytes = 0u64;
    loop {
        let n = match reader.read(&mut buffer) {
            Ok(0) => break,
            Ok(n) => n,
            Err(err) if err.kind() == io::ErrorKind::Interrupted => continue,
            Err(err) => {
                let _ = fs::remove_file(&tmp_path);
                return Err(err);
            }
        };
        hasher.update(&buffer[..n]);
        encoder.write_all(&buffer[..n])?;
        bytes += n as u64;
    }
    let file = encoder.finish()?;
    file.sync_all()?;
    let sha256: String = hasher.finalize().iter().map(|b| format!("{b:02x}")).collect();
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

/// Opens an archived extract; reading yields the original bytes.
pub fn open(archive: &Path, sha256: &str) -> io::Result<impl Read> {
    let file = File::open(path_of(archive, sha256))?;
    Ok(GzDecoder::new(BufReader::new(file)))
}

/// Where the bytes with this SHA-256 live.
pub fn path_of(archive: &Path, sha256: &str) -> PathBuf {
    let prefix = sha256.get(..2).unwrap_or("xx");
    archive.join(prefix).join(format!("{sha256}.gz"))
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
}
