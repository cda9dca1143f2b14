//! House-style checks over the source tree: every Rust file opens with a `//!` paragraph
//! saying what it owns; only `store` names rusqlite or writes SQL; every module names only
//! the layers below it (the table in ARCHITECTURE.md); the `app` modules import each other
//! without a circle.

use std::fs;
use std::path::{Path, PathBuf};

/// Every file below `dir` whose extension is one of `extensions`.
fn files_with(dir: &Path, extensions: &[&str], out: &mut Vec<PathBuf>) {
    for entry in fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        if path.is_dir() {
            files_with(&path, extensions, out);
        } else if path.extension().is_some_and(|e| extensions.iter().any(|x| e == *x)) {
            out.push(path);
        }
    }
}

/// The Rust files below `sub` of the project.
fn files(sub: &str) -> Vec<PathBuf> {
    let mut out = Vec::new();
    files_with(&Path::new(env!("CARGO_MANIFEST_DIR")).join(sub), &["rs"], &mut out);
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

/// Which top-level modules each module may name (`crate::X`): the layers, lowest first.
/// `app` is the wiring and may name any; nothing names `app` (but `main.rs`, outside the
/// library). ARCHITECTURE.md shows the same table.
const LAYERS: &[(&str, &[&str])] = &[
    ("model", &[]),
    ("text", &[]),
    ("table", &[]),
    ("metrics", &[]),
    ("analysis", &["model"]),
    ("config", &["model", "text", "analysis"]),
    ("extract", &["model", "text", "config"]),
    ("source", &["model", "text", "config"]),
    ("demo", &["model", "config"]),
    ("store", &["model", "text", "table", "config", "extract", "analysis"]),
    ("alert", &["model", "text", "config", "analysis", "store"]),
    ("export", &["model", "text", "table", "store"]),
    ("serve", &["model", "text", "table", "metrics", "config", "analysis", "store", "alert"]),
];

/// Lines of a source file that are code, not comments.
fn code_lines(text: &str) -> impl Iterator<Item = &str> {
    text.lines().filter(|line| !line.trim_start().starts_with("//"))
}

/// The top-level module a file under `src/` belongs to (`None` for lib.rs and main.rs).
fn top_module(path: &Path) -> Option<String> {
    let relative = path.strip_prefix(Path::new(env!("CARGO_MANIFEST_DIR")).join("src")).ok()?;
    let first = relative.components().next()?.as_os_str().to_string_lossy().into_owned();
    let name = first.trim_end_matches(".rs").to_string();
    (name != "lib" && name != "main").then_some(name)
}

/// Every `crate::X` a file names in code.
fn crate_modules(text: &str) -> std::collections::BTreeSet<String> {
    let mut found = std::collections::BTreeSet::new();
    for line in code_lines(text) {
        for (at, _) in line.match_indices("crate::") {
            let name: String =
                line[at + 7..].chars().take_while(|c| c.is_ascii_lowercase() || *c == '_').collect();
            if !name.is_empty() {
                found.insert(name);
            }
        }
    }
    found
}

#[test]
fn imports_follow_the_layers() {
    let mut offenders = Vec::new();
    for path in files("src") {
        let Some(module) = top_module(&path) else { continue };
        if module == "app" {
            continue;
        }
        let allowed = LAYERS.iter().find(|(name, _)| *name == module).map(|(_, a)| *a);
        let Some(allowed) = allowed else {
            offenders.push(format!("{}: module {module} is not in the LAYERS table", path.display()));
            continue;
        };
        for used in crate_modules(&fs::read_to_string(&path).unwrap()) {
            if used != module && !allowed.contains(&used.as_str()) {
                offenders.push(format!("{}: {module} names crate::{used}", path.display()));
            }
        }
    }
    assert!(offenders.is_empty(), "imports against the layers:\n{}", offenders.join("\n"));
}

#[test]
fn the_app_modules_import_each_other_without_a_circle() {
    let app = Path::new(env!("CARGO_MANIFEST_DIR")).join("src/app");
    let mut edges: std::collections::BTreeMap<String, std::collections::BTreeSet<String>> =
        Default::default();
    for path in files("src/app") {
        let name =
            path.strip_prefix(&app).unwrap().components().next().unwrap().as_os_str().to_string_lossy();
        let name = name.trim_end_matches(".rs").to_string();
        let text = fs::read_to_string(&path).unwrap();
        let targets = edges.entry(name.clone()).or_default();
        for line in code_lines(&text) {
            for (at, _) in line.match_indices("super::") {
                let rest = &line[at + 7..];
                let names: Vec<String> = match rest.strip_prefix('{') {
                    Some(list) => list
                        .split('}')
                        .next()
                        .unwrap_or("")
                        .split(',')
                        .map(|n| n.trim().to_string())
                        .collect(),
                    None => vec![rest.chars().take_while(|c| c.is_ascii_lowercase() || *c == '_').collect()],
                };
                targets.extend(
                    names
                        .into_iter()
                        .map(|n| n.split("::").next().unwrap_or("").to_string())
                        .filter(|n| !n.is_empty() && *n != name),
                );
            }
        }
    }
    // Depth-first search for a back edge.
    fn visit(
        node: &str,
        edges: &std::collections::BTreeMap<String, std::collections::BTreeSet<String>>,
        path: &mut Vec<String>,
        done: &mut std::collections::BTreeSet<String>,
    ) -> Option<Vec<String>> {
        if let Some(at) = path.iter().position(|n| n == node) {
            let mut circle = path[at..].to_vec();
            circle.push(node.to_string());
            return Some(circle);
        }
        if !done.insert(node.to_string()) {
            return None;
        }
        path.push(node.to_string());
        for next in edges.get(node).into_iter().flatten() {
            if let Some(circle) = visit(next, edges, path, done) {
                return Some(circle);
            }
        }
        path.pop();
        None
    }
    let mut done = std::collections::BTreeSet::new();
    for node in edges.keys() {
        let mut path = Vec::new();
        if let Some(circle) = visit(node, &edges, &mut path, &mut done) {
            panic!("app modules import each other in a circle: {}", circle.join(" -> "));
        }
    }
}

/// SQL statements as words: a keyword and the word that must follow it within a few words.
const SQL_SHAPES: &[(&str, &str, usize)] = &[
    ("SELECT", "FROM", 60),
    ("INSERT", "INTO", 1),
    ("DELETE", "FROM", 1),
    ("UPDATE", "SET", 2),
    ("CREATE", "TABLE", 3),
    ("CREATE", "INDEX", 3),
    ("CREATE", "VIEW", 3),
    ("DROP", "TABLE", 1),
];

/// Whether code (comments aside) holds a SQL statement: an upper-case keyword followed by
/// its partner word (`SELECT .. FROM`, `INSERT INTO`, ...).
fn holds_sql(text: &str) -> bool {
    let code: Vec<&str> = code_lines(text).collect();
    let joined = code.join("\n");
    let words: Vec<&str> =
        joined.split(|c: char| !(c.is_ascii_alphanumeric() || c == '_')).filter(|w| !w.is_empty()).collect();
    words.iter().enumerate().any(|(at, word)| {
        SQL_SHAPES.iter().any(|(first, then, within)| {
            word == first && words[at + 1..].iter().take(*within).any(|w| w == then)
        })
    })
}

#[test]
fn no_sql_outside_store() {
    assert!(holds_sql("let x = \"SELECT a, b FROM t\";") && holds_sql("\"DELETE FROM t\""));
    assert!(!holds_sql("// SELECT a FROM t\nlet select = 1;"), "comments and lower case are not SQL");
    let offenders: Vec<String> = files("src")
        .into_iter()
        .filter(|p| top_module(p).is_some_and(|m| m != "store"))
        .filter(|p| holds_sql(&fs::read_to_string(p).unwrap()))
        .map(|p| p.display().to_string())
        .collect();
    assert!(offenders.is_empty(), "SQL outside src/store (only store knows SQL): {offenders:?}");
}

/// The keys a config file may hold: every field of the `Raw*` serde structs in `src/config`
/// (under its `rename`, if any), and every key the rule tables read (`keys.float("name", ..)`).
fn config_keys() -> std::collections::BTreeSet<String> {
    let mut keys = std::collections::BTreeSet::new();
    for path in files("src/config") {
        let text = fs::read_to_string(&path).unwrap();
        let mut in_raw = false;
        let mut rename = None;
        for line in code_lines(&text) {
            let line = line.trim();
            if line.starts_with("pub struct Raw") && line.ends_with('{') {
                in_raw = true;
            } else if in_raw && line == "}" {
                in_raw = false;
            } else if in_raw && line.starts_with("#[serde(") {
                rename = line
                    .split("rename = \"")
                    .nth(1)
                    .and_then(|rest| rest.split('"').next())
                    .map(str::to_string);
            } else if in_raw && line.starts_with("pub ") && line.contains(':') {
                let name = line["pub ".len()..].split(':').next().unwrap().trim().to_string();
                keys.insert(rename.take().unwrap_or(name));
            }
            for reader in ["keys.float(\"", "keys.count(\"", "keys.flag(\"", "keys.text(\""] {
                if let Some(rest) = line.split(reader).nth(1) {
                    keys.insert(rest.split('"').next().unwrap().to_string());
                }
            }
        }
    }
    keys
}

/// The subcommands `tidemark --help` lists, with the nested ones as `parent child`.
fn subcommands() -> Vec<String> {
    let help = |args: &[&str]| {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_tidemark")).args(args).output().unwrap();
        String::from_utf8(out.stdout).unwrap()
    };
    let listed = |text: &str| -> Vec<String> {
        text.lines()
            .skip_while(|line| !line.starts_with("Commands:"))
            .skip(1)
            .take_while(|line| line.starts_with("  "))
            .filter_map(|line| line.split_whitespace().next())
            .filter(|name| *name != "help")
            .map(str::to_string)
            .collect()
    };
    let mut all = Vec::new();
    for command in listed(&help(&["--help"])) {
        for child in listed(&help(&[&command, "--help"])) {
            all.push(format!("{command} {child}"));
        }
        all.push(command);
    }
    all
}

#[test]
fn docs_name_every_config_key_and_subcommand() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let configuration = fs::read_to_string(root.join("docs/configuration.md")).unwrap();
    let keys = config_keys();
    assert!(keys.len() > 60 && keys.contains("max_bytes") && keys.contains("min_effect"), "{keys:?}");
    let undocumented: Vec<&String> =
        keys.iter().filter(|key| !configuration.contains(&format!("`{key}`"))).collect();
    assert!(undocumented.is_empty(), "config keys missing from docs/configuration.md: {undocumented:?}");

    let cli = fs::read_to_string(root.join("docs/cli.md")).unwrap();
    let commands = subcommands();
    assert!(commands.iter().any(|c| c == "token create"), "{commands:?}");
    let missing: Vec<&String> = commands
        .iter()
        .filter(|command| {
            let last = command.rsplit(' ').next().unwrap();
            let named = [
                format!("## {command}"),
                format!("`{command}"),
                format!("tidemark {command}"),
                format!("`{last}`"),
            ];
            !named.iter().any(|name| cli.contains(name.as_str()))
        })
        .collect();
    assert!(missing.is_empty(), "subcommands missing from docs/cli.md: {missing:?}");
}

/// Nothing in the repository points outside it or at the tracker: no reference to the
/// shared folder beside the checkout or to its reference-value file, and no tracker number
/// in place of the requirement it stands for. The patterns are assembled here, so this file
/// is checked like any other.
#[test]
fn the_repository_refers_to_nothing_outside_itself() {
    const TEXT_FILES: &[&str] =
        &["rs", "md", "sql", "toml", "service", "cron", "example", "html", "js", "css"];
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let mut paths = Vec::new();
    for sub in ["src", "tests", "benches", "docs", "migrations", "config", "deploy"] {
        files_with(&root.join(sub), TEXT_FILES, &mut paths);
    }
    for name in ["README.md", "ARCHITECTURE.md", "DEVELOPERS.md", "Cargo.toml"] {
        paths.push(root.join(name));
    }
    let word = "issue";
    let mut patterns: Vec<String> = (1..=9).map(|n| format!("{word} {n}")).collect();
    patterns.push(format!("{word} #"));
    patterns.push(["..", "shared"].join("/"));
    patterns.push(["reference", "checks"].join("-"));
    let offenders: Vec<String> = paths
        .iter()
        .filter(|path| {
            let text = fs::read_to_string(path).unwrap_or_default().to_lowercase();
            patterns.iter().any(|p| text.contains(p.as_str()))
        })
        .map(|path| path.display().to_string())
        .collect();
    assert!(offenders.is_empty(), "files pointing outside the repository or at the tracker: {offenders:?}");
}
