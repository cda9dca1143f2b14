//! Folder sources: list the files in one folder that match the source's pattern, refusing
//! anything that leaves the folder (symlinks to elsewhere, `..`), reporting unreadable files
//! without failing the poll, and telling complete files from ones still being written
//! (size and mtime stable across two looks, or a ready-marker file). Files are never moved
//! or changed.

use std::collections::HashMap;
use std::fs::{self, File};
use std::io;
use std::path::{Path, PathBuf};
use std::time::UNIX_EPOCH;

/// A file as seen on one look.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SeenFile {
    pub path: PathBuf,
    pub name: String,
    pub size: u64,
    pub mtime_ns: i64,
}

/// What one look at the folder found.
#[derive(Debug, Clone, Default)]
pub struct Listing {
    pub files: Vec<SeenFile>,
    /// Files that were refused or could not be read, as messages naming the file.
    pub problems: Vec<String>,
}

/// Looks at the folder once. A missing or unreadable folder is an error; a bad file is a
/// problem and the rest of the listing goes on.
pub fn look(dir: &Path, pattern: &str, ready_marker: Option<&str>) -> io::Result<Listing> {
    let root = fs::canonicalize(dir)?;
    let mut listing = Listing::default();
    let mut names: Vec<String> = Vec::new();
    for entry in fs::read_dir(&root)? {
        let entry = entry?;
        names.push(entry.file_name().to_string_lossy().into_owned());
    }
    names.sort();
    for name in &names {
        if name.starts_with('.')
            || ready_marker.is_some_and(|m| name.ends_with(m))
            || !glob_match(pattern, name)
        {
            continue;
        }
        if let Some(marker) = ready_marker
            && !names.contains(&format!("{name}{marker}"))
        {
            continue;
        }
        match inspect(&root, name) {
            Ok(Some(file)) => listing.files.push(file),
            Ok(None) => {}
            Err(problem) => listing.problems.push(problem),
        }
    }
    Ok(listing)
}

/// The files of `second` that are unchanged since `first`: a file still being written has
/// grown or been touched between the looks.
pub fn stable(first: &Listing, second: &Listing) -> Vec<SeenFile> {
    let before: HashMap<&Path, (u64, i64)> =
        first.files.iter().map(|f| (f.path.as_path(), (f.size, f.mtime_ns))).collect();
    second
        .files
        .iter()
        .filter(|f| before.get(f.path.as_path()) == Some(&(f.size, f.mtime_ns)))
        .cloned()
        .collect()
}

fn inspect(root: &Path, name: &str) -> Result<Option<SeenFile>, String> {
    let path = root.join(name);
    let real = fs::canonicalize(&path).map_err(|err| format!("{name}: cannot resolve ({err})"))?;
    if real.parent() != Some(root) {
        return Err(format!("{name}: refused, it leads outside the source folder"));
    }
    let meta = fs::metadata(&real).map_err(|err| format!("{name}: cannot read metadata ({err})"))?;
    if !meta.is_file() {
        return Ok(None);
    }
    File::open(&real).map_err(|err| format!("{name}: cannot be read ({err})"))?;
    let (size, mtime_ns) = size_and_mtime(&meta);
    Ok(Some(SeenFile { path: real, name: name.to_string(), size, mtime_ns }))
}

/// A file's size and modification time (nanoseconds since the epoch; 0 if unknown), as a
/// listing records them and as they are checked again around a read.
pub fn size_and_mtime(meta: &fs::Metadata) -> (u64, i64) {
    let mtime_ns = meta
        .modified()
        .ok()
        .and_then(|t| t.duration_since(UNIX_EPOCH).ok())
        .map(|d| d.as_nanos() as i64)
        .unwrap_or_default();
    (meta.len(), mtime_ns)
}

/// Shell-style matching of a file name: `*` any run of characters, `?` one character.
pub fn glob_match(pattern: &str, name: &str) -> bool {
    let (p, n): (Vec<char>, Vec<char>) = (pattern.chars().collect(), name.chars().collect());
    let (mut pi, mut ni) = (0, 0);
    let mut star: Option<(usize, usize)> = None;
    while ni < n.len() {
        if pi < p.len() && (p[pi] == '?' || p[pi] == n[ni]) {
            pi += 1;
            ni += 1;
        } else if pi < p.len() && p[pi] == '*' {
            star = Some((pi, ni));
            pi += 1;
        } else if let Some((star_p, star_n)) = star {
            pi = star_p + 1;
            ni = star_n + 1;
            star = Some((star_p, star_n + 1));
        } else {
            return false;
        }
    }
    p[pi..].iter().all(|&c| c == '*')
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::os::unix::fs::PermissionsExt;

    #[test]
    fn globs() {
        let cases = [
            ("*.csv", "a.csv", true),
            ("*.csv", "a.csv.gz", false),
            ("*.csv*", "a.csv.gz", true),
            ("labs-????.ndjson", "labs-2026.ndjson", true),
            ("labs-????.ndjson", "labs-26.ndjson", false),
            ("*", "anything", true),
            ("a*b*c", "aXbYc", true),
            ("a*b*c", "aXbY", false),
        ];
        for (pattern, name, want) in cases {
            assert_eq!(glob_match(pattern, name), want, "{pattern} {name}");
        }
    }

    #[test]
    fn refuses_escapes_and_reports_unreadable_files() {
        let dir = tempfile::tempdir().unwrap();
        let feed = dir.path().join("feed");
        fs::create_dir(&feed).unwrap();
        fs::write(dir.path().join("outside.csv"), "x").unwrap();
        fs::write(feed.join("a.csv"), "a").unwrap();
        fs::write(feed.join("b.txt"), "b").unwrap();
        fs::write(feed.join(".hidden.csv"), "h").unwrap();
        std::os::unix::fs::symlink(dir.path().join("outside.csv"), feed.join("escape.csv")).unwrap();
        std::os::unix::fs::symlink(feed.join("a.csv"), feed.join("alias.csv")).unwrap();
        fs::write(feed.join("locked.csv"), "l").unwrap();
        fs::set_permissions(feed.join("locked.csv"), fs::Permissions::from_mode(0o000)).unwrap();
        let listing = look(&feed, "*.csv", None).unwrap();
        let names: Vec<&str> = listing.files.iter().map(|f| f.name.as_str()).collect();
        assert!(names.contains(&"a.csv"));
        assert!(
            !names.contains(&"escape.csv") && !names.contains(&"b.txt") && !names.contains(&".hidden.csv")
        );
        assert!(
            listing.problems.iter().any(|p| p.starts_with("escape.csv: refused")),
            "{:?}",
            listing.problems
        );
        // Root can read a 0000 file; only an unprivileged user sees the permission problem.
        let root = File::open(feed.join("locked.csv")).is_ok();
        assert_eq!(listing.problems.iter().any(|p| p.starts_with("locked.csv: cannot be read")), !root);
    }

    #[test]
    fn ready_markers_and_stability() {
        let dir = tempfile::tempdir().unwrap();
        fs::write(dir.path().join("a.csv"), "a").unwrap();
        fs::write(dir.path().join("b.csv"), "b").unwrap();
        fs::write(dir.path().join("b.csv.done"), "").unwrap();
        let marked = look(dir.path(), "*.csv", Some(".done")).unwrap();
        assert_eq!(marked.files.iter().map(|f| f.name.as_str()).collect::<Vec<_>>(), ["b.csv"]);
        let first = look(dir.path(), "*.csv", None).unwrap();
        fs::write(dir.path().join("a.csv"), "aa").unwrap();
        let second = look(dir.path(), "*.csv", None).unwrap();
        let names: Vec<String> = stable(&first, &second).into_iter().map(|f| f.name).collect();
        assert_eq!(names, ["b.csv"]);
    }
}
