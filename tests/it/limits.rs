//! Hostile extracts through the real `tidemark ingest` binary, each in bounded memory: a
//! gzip bomb (10 GiB of zeros in about 10 MB), a 50 MB line, a row of 25 million cells and
//! JSON nested 100,000 deep. Each fails whole with the limit it went over (exit 1, a
//! `failed` snapshot, nothing applied) while the process's peak resident memory, sampled
//! from `/proc/PID/status` (VmHWM), stays under `PEAK_RSS_BOUND_KB`.

use std::io::Write;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use crate::support::{config_toml, count, open_ro, proc_status_kib, source_toml};

/// The bound the limits keep every hostile file under (the debug build used by the tests,
/// which allocates more freely than the release build).
const PEAK_RSS_BOUND_KB: u64 = 300 * 1024;

/// Runs `tidemark ingest FILE` and returns (exit code, output, peak RSS in KiB).
fn ingest_measured(config: &Path, file: &Path, source: &str) -> (i32, String, u64) {
    let mut child = Command::new(assert_cmd::cargo::cargo_bin("tidemark"))
        .env_remove("TIDEMARK_CONFIG")
        .env_remove("TIDEMARK_LOG")
        .arg("--config")
        .arg(config)
        .args(["ingest", file.to_str().unwrap(), "--source", source, "--as-of", "2026-03-10"])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let (mut peak, started) = (0, Instant::now());
    let status = loop {
        if let Some(kb) = proc_status_kib(child.id(), "VmHWM") {
            peak = peak.max(kb);
        }
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        assert!(started.elapsed() < Duration::from_secs(120), "ingest of {} took too long", file.display());
        std::thread::sleep(Duration::from_millis(5));
    };
    let output = child.wait_with_output().unwrap();
    let text =
        format!("{}{}", String::from_utf8_lossy(&output.stdout), String::from_utf8_lossy(&output.stderr));
    (status.code().expect("not killed by a signal"), text, peak)
}

/// 10 GiB of zeros as 10,240 gzip members of 1 MiB each (RFC 1952 allows many members).
fn gzip_bomb() -> Vec<u8> {
    let mut member = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::best());
    member.write_all(&vec![0u8; 1 << 20]).unwrap();
    let member = member.finish().unwrap();
    member.repeat(10 * 1024)
}

#[test]
fn hostile_extracts_fail_whole_in_bounded_memory() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("tidemark.toml");
    let sources = [source_toml("csvfeed", "csv", "full", ""), source_toml("jsonfeed", "json", "full", "")];
    std::fs::write(&config, config_toml(&sources)).unwrap();
    let header = "case_id,district,onset,reported,age,sex,symptoms\n";
    let cases: Vec<(&str, &str, Vec<u8>, &str)> = vec![
        // Zeros without a newline: whichever of the expansion and record limits comes first.
        ("bomb.csv.gz", "csvfeed", gzip_bomb(), "limits.max_"),
        (
            "long_header.csv",
            "csvfeed",
            [vec![b'h'; 50 << 20], b"\n".to_vec()].concat(),
            "limits.max_record_bytes",
        ),
        (
            "wide_row.csv",
            "csvfeed",
            [header.as_bytes(), &vec![b','; 25_000_000], b"\n"].concat(),
            "limits.max_columns",
        ),
        (
            "deep.json",
            "jsonfeed",
            format!(r#"[{{"case_id": "C-1", "district": {}1{}}}]"#, "[".repeat(100_000), "]".repeat(100_000))
                .into_bytes(),
            "limits.max_json_depth",
        ),
    ];
    let store = dir.path().join("store/tidemark.db");
    for (name, source, bytes, want) in cases {
        let file = dir.path().join(name);
        std::fs::write(&file, &bytes).unwrap();
        drop(bytes);
        let (code, output, peak) = ingest_measured(&config, &file, source);
        eprintln!("{name}: exit {code}, peak RSS {} MiB", peak / 1024);
        assert_eq!(code, 1, "{name}: {output}");
        assert!(output.contains(want) && output.contains("failed"), "{name}: {output}");
        assert!(peak > 0 && peak < PEAK_RSS_BOUND_KB, "{name}: peak RSS {peak} KiB");
        std::fs::remove_file(&file).unwrap();
    }
    let db = open_ro(&store);
    assert_eq!(count(&db, "SELECT count(*) FROM case_version"), 0);
    assert_eq!(count(&db, "SELECT count(*) FROM snapshot WHERE status <> 'failed'"), 0);
}
