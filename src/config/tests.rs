//! Config validation tests: what the user wrote -> the problems they see, by key path.

use std::path::Path;

use super::*;
use crate::model::Field;

fn problems(text: &str) -> Vec<String> {
    match Config::parse(text, Path::new("/etc/tidemark/t.toml")) {
        Err(ConfigError::Invalid { problems, .. }) => problems,
        Err(other) => vec![other.to_string()],
        Ok(_) => vec![],
    }
}

const MINIMAL: &str = "[[source]]\nname = \"a\"\nkind = \"folder\"\npath = \"in\"\nkey = \"id\"\n";

#[test]
fn example_config_is_valid() {
    let config = Config::parse(EXAMPLE, Path::new("/srv/tidemark/tidemark.toml")).unwrap();
    let source = config.source("county-reports").unwrap();
    assert_eq!(source.mapping.column(Field::OnsetDate), Some("symptom_onset"));
    assert_eq!(config.store.path, Path::new("/srv/tidemark/data/tidemark.db"));
    assert_eq!(config.bind.to_string(), DEFAULT_BIND);
}

#[test]
fn minimal_config_takes_defaults() {
    let config = Config::parse(MINIMAL, Path::new("/x/t.toml")).unwrap();
    let source = &config.sources[0];
    assert_eq!(source.as_of, AsOfRule::FileMtime);
    assert_eq!(source.hold_fraction, 0.2);
    assert_eq!(source.format, crate::model::Format::Csv);
}

#[test]
fn errors_name_the_key_path() {
    let cases: &[(&str, &str)] = &[
        ("schedule = \"every day\"", "source[0].schedule: invalid cron expression"),
        (
            "extract = \"partial\"",
            "source[0].extract: unknown extract kind \"partial\"; accepted: full, delta",
        ),
        ("format = \"xml\"", "source[0].format:"),
        ("as_of = \"yesterday\"", "source[0].as_of:"),
        ("expect_every = \"a while\"", "source[0].expect_every:"),
        ("hold_fraction = 1.5", "source[0].hold_fraction:"),
        ("delimiter = \"::\"", "source[0].delimiter:"),
        ("encoding_fallback = \"ebcdic\"", "source[0].encoding_fallback:"),
        ("[source.fields]\nbirthday = \"dob\"", "source[0].fields.birthday: not a canonical field"),
        ("[source.fields]\ncase_key = \"id\"", "source[0].fields.case_key: use `key`"),
        ("[source.values.onset]\nx = \"y\"", "source[0].values.onset:"),
        ("colour = \"blue\"", "unknown field `colour`"),
    ];
    for (extra, want) in cases {
        let text = format!("{MINIMAL}{extra}\n");
        let found = problems(&text);
        assert!(found.iter().any(|p| p.contains(want)), "{extra}: wanted {want:?}, got {found:?}");
    }
}

#[test]
fn duplicate_source_names_and_bad_kinds() {
    let text = format!("{MINIMAL}{}", MINIMAL.replace("folder", "ftp"));
    let found = problems(&text);
    assert!(found.iter().any(|p| p.starts_with("source[1].name:")), "{found:?}");
    assert!(found.iter().any(|p| p.starts_with("source[1].kind:")), "{found:?}");
}

#[test]
fn describe_redacts_secrets() {
    let text = format!(
        "{MINIMAL}[alert.webhook]\nurl = \"https://hooks.example/T000/secret-token\"\nsecret_env = \"TIDEMARK_TEST_UNSET_SECRET\"\n"
    );
    let config = Config::parse(&text, Path::new("/x/t.toml")).unwrap();
    let shown = config.describe();
    assert!(!shown.contains("secret-token"), "{shown}");
    assert!(shown.contains("$TIDEMARK_TEST_UNSET_SECRET (not set)"), "{shown}");
}

#[test]
fn durations() {
    let cases = [
        ("90s", Some(90)),
        ("15m", Some(900)),
        ("26h", Some(93_600)),
        ("2d", Some(172_800)),
        ("h", None),
        ("250ms", Some(0)),
        ("5y", None),
    ];
    for (text, want) in cases {
        assert_eq!(parse_duration(text).map(|d| d.as_secs()), want, "{text}");
    }
}

#[test]
fn deployment_example_is_valid() {
    let text = include_str!("../../deploy/tidemark.toml");
    let config = Config::parse(text, Path::new("/etc/tidemark/tidemark.toml")).unwrap();
    assert_eq!(config.sources.len(), 2);
    assert!(config.log_json);
    assert_eq!(config.store.path, Path::new("/var/lib/tidemark/tidemark.db"));
}

/// Channels page on warnings and critical alerts unless told otherwise; the example config
/// routes every alert to its webhook.
#[test]
fn channels_default_to_warning_and_above() {
    let text = format!(
        "{MINIMAL}[alert.email]\nsmtp = \"127.0.0.1:25\"\nfrom = \"t@x.example\"\nto = [\"o@x.example\"]\n\
         [alert.webhook]\nurl = \"https://hooks.example/a\"\n"
    );
    let config = Config::parse(&text, Path::new("/x/t.toml")).unwrap();
    assert_eq!(config.email.unwrap().min_severity, Severity::Warning);
    assert_eq!(config.webhook.unwrap().min_severity, Severity::Warning);
    let example = EXAMPLE.replace("# [alert.webhook]", "[alert.webhook]").replace("# url = ", "url = ");
    let example = example.replace("# min_severity = \"info\"", "min_severity = \"info\"");
    let routed = Config::parse(&example, Path::new("/srv/tidemark/tidemark.toml")).unwrap();
    assert_eq!(routed.webhook.unwrap().min_severity, Severity::Info);
}

/// A channel's digest schedule is parsed, and a bad one names the key and the field.
#[test]
fn channel_digest_schedules_are_checked() {
    let email = |digest: &str| {
        format!(
            "{MINIMAL}[alert.email]\nsmtp = \"127.0.0.1:25\"\nfrom = \"t@x.example\"\nto = [\"o@x.example\"]\ndigest = \"{digest}\"\n"
        )
    };
    let config = Config::parse(&email("0 0 7 * * *"), Path::new("/x/t.toml")).unwrap();
    assert_eq!(config.email.unwrap().digest.unwrap().text(), "0 0 7 * * *");
    let err = Config::parse(&email("0 0 25 * * *"), Path::new("/x/t.toml")).unwrap_err().to_string();
    assert!(err.contains("alert.email.digest: hour"), "{err}");
}
