//! House-style checks over the source tree: every Rust file opens with a `//!` paragraph
//! saying what it owns, and only `store` names rusqlite.

use std::fs;
use std::path::{Path, PathBuf};

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for entry in fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        if path.is_dir() {
            rust_files(&path, out);
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
}

fn files(sub: &str) -> Vec<PathBuf> {
    let mut out = Vec::new();
    rust_files(&Path::new(env!("CARGO_MANIFEST_DIR")).join(sub), &mut out);
    out
}

#[test]
fn every_source_file_opens_with_a_module_doc() {
    let mut missing = Vec::new();
    for sub in ["src", "tests", "benches"] {
        for path in files(sub) {
            let text = fs::read_to_string(&path).unwrap();
            if !text.trim_start().starts_with("//!") {
                missing.push(path.display().to_string());
            }
        }
    }
    assert!(missing.is_empty(), "files without a //! paragraph: {missing:?}");
}

#[test]
fn only_store_names_rusqlite() {
    let offenders: Vec<String> = files("src")
        .into_iter()
        .filter(|p| !p.components().any(|c| c.as_os_str() == "store"))
        .filter(|p| fs::read_to_string(p).unwrap().contains("rusqlite"))
        .map(|p| p.display().to_string())
        .collect();
    assert!(offenders.is_empty(), "rusqlite outside src/store: {offenders:?}");
}
