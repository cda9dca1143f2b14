//! Operational counters of the daemon, per source, and their Prometheus text exposition.
//! Counts and durations only: no label or value here ever carries patient-level data
//! (source names come from the config).

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// Counters of one source.
#[derive(Debug, Clone, Default)]
pub struct SourceCounters {
    /// Snapshots by status (`applied`, `held`, `failed`, `duplicate`).
    pub ingests: BTreeMap<&'static str, u64>,
    pub rows: u64,
    pub rejects: u64,
    pub poll_failures: u64,
    pub polls: u64,
    pub poll_seconds_sum: f64,
    pub last_success: Option<Instant>,
    /// Post-snapshot steps by step name.
    pub steps: BTreeMap<&'static str, StepCounters>,
}

/// Counters of one post-snapshot step of one source.
#[derive(Debug, Clone, Copy, Default)]
pub struct StepCounters {
    pub ok: u64,
    pub failed: u64,
    pub seconds_sum: f64,
}

/// All the daemon's counters. A std `Mutex` is right here: critical sections are a few
/// additions, never held across an await.
#[derive(Debug, Default)]
pub struct Metrics {
    sources: Mutex<BTreeMap<String, SourceCounters>>,
}

impl Metrics {
    pub fn update(&self, source: &str, change: impl FnOnce(&mut SourceCounters)) {
        let mut sources = self.sources.lock().unwrap_or_else(|p| p.into_inner());
        change(sources.entry(source.to_string()).or_default());
    }

    /// Records the end of one poll.
    pub fn poll_finished(&self, source: &str, took: Duration, ok: bool) {
        self.update(source, |c| {
            c.polls += 1;
            c.poll_seconds_sum += took.as_secs_f64();
            if ok {
                c.last_success = Some(Instant::now());
            } else {
                c.poll_failures += 1;
            }
        });
    }

    /// Records the end of one post-snapshot step.
    pub fn step_finished(&self, source: &str, step: &'static str, took: Duration, ok: bool) {
        self.update(source, |c| {
            let counters = c.steps.entry(step).or_default();
            counters.seconds_sum += took.as_secs_f64();
            if ok {
                counters.ok += 1;
            } else {
                counters.failed += 1;
            }
        });
    }

    pub fn snapshot(&self) -> BTreeMap<String, SourceCounters> {
        self.sources.lock().unwrap_or_else(|p| p.into_inner()).clone()
    }

    /// The Prometheus text format (version 0.0.4).
    pub fn render(&self, now: Instant) -> String {
        let sources = self.snapshot();
        let mut out = String::new();
        let mut family = |name: &str, kind: &str, help: &str, values: Vec<(String, String)>| {
            let _ = writeln!(out, "# HELP {name} {help}\n# TYPE {name} {kind}");
            for (labels, value) in values {
                let _ = writeln!(out, "{name}{{{labels}}} {value}");
            }
        };
        let per_source = |f: &dyn Fn(&SourceCounters) -> String| -> Vec<(String, String)> {
            sources.iter().map(|(name, c)| (format!("source=\"{}\"", escape(name)), f(c))).collect()
        };
        let ingests = sources
            .iter()
            .flat_map(|(name, c)| {
                c.ingests.iter().map(move |(status, n)| {
                    (format!("source=\"{}\",status=\"{status}\"", escape(name)), n.to_string())
                })
            })
            .collect();
        family("tidemark_ingests_total", "counter", "Extracts ingested, by resulting status.", ingests);
        family(
            "tidemark_rows_total",
            "counter",
            "Rows read from extracts.",
            per_source(&|c| c.rows.to_string()),
        );
        family("tidemark_rejects_total", "counter", "Rows rejected.", per_source(&|c| c.rejects.to_string()));
        family(
            "tidemark_poll_failures_total",
            "counter",
            "Polls that failed.",
            per_source(&|c| c.poll_failures.to_string()),
        );
        family("tidemark_polls_total", "counter", "Polls finished.", per_source(&|c| c.polls.to_string()));
        family(
            "tidemark_poll_duration_seconds_sum",
            "counter",
            "Total time spent polling.",
            per_source(&|c| format!("{:.6}", c.poll_seconds_sum)),
        );
        let per_step = |f: &dyn Fn(&StepCounters) -> Vec<(&'static str, String)>| -> Vec<(String, String)> {
            sources
                .iter()
                .flat_map(|(name, c)| {
                    c.steps.iter().flat_map(move |(step, counters)| {
                        f(counters).into_iter().map(move |(extra, value)| {
                            (format!("source=\"{}\",step=\"{step}\"{extra}", escape(name)), value)
                        })
                    })
                })
                .collect()
        };
        family(
            "tidemark_analysis_steps_total",
            "counter",
            "Post-snapshot steps run (nowcasts, delay_fits, quality, alert_rules), by outcome.",
            per_step(&|c| {
                vec![(",outcome=\"ok\"", c.ok.to_string()), (",outcome=\"failed\"", c.failed.to_string())]
            }),
        );
        family(
            "tidemark_analysis_step_seconds_sum",
            "counter",
            "Total time spent in each post-snapshot step.",
            per_step(&|c| vec![("", format!("{:.6}", c.seconds_sum))]),
        );
        family(
            "tidemark_seconds_since_last_success",
            "gauge",
            "Seconds since the source's last successful poll (NaN before the first).",
            per_source(&|c| match c.last_success {
                Some(at) => format!("{:.3}", now.duration_since(at).as_secs_f64()),
                None => "NaN".into(),
            }),
        );
        out
    }
}

fn escape(label: &str) -> String {
    label.replace('\\', "\\\\").replace('"', "\\\"").replace('\n', "\\n")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn renders_prometheus_text() {
        let metrics = Metrics::default();
        metrics.update("county", |c| {
            *c.ingests.entry("applied").or_default() += 2;
            c.rows += 10;
        });
        metrics.poll_finished("county", Duration::from_millis(250), true);
        metrics.step_finished("county", "nowcasts", Duration::from_millis(500), true);
        metrics.step_finished("county", "nowcasts", Duration::from_millis(250), false);
        let text = metrics.render(Instant::now());
        assert!(
            text.contains(
                "tidemark_analysis_steps_total{source=\"county\",step=\"nowcasts\",outcome=\"ok\"} 1"
            )
        );
        assert!(text.contains(
            "tidemark_analysis_steps_total{source=\"county\",step=\"nowcasts\",outcome=\"failed\"} 1"
        ));
        assert!(
            text.contains("tidemark_analysis_step_seconds_sum{source=\"county\",step=\"nowcasts\"} 0.750000")
        );
        assert!(text.contains("# TYPE tidemark_ingests_total counter"));
        assert!(text.contains("tidemark_ingests_total{source=\"county\",status=\"applied\"} 2"));
        assert!(text.contains("tidemark_rows_total{source=\"county\"} 10"));
        assert!(text.contains("tidemark_poll_duration_seconds_sum{source=\"county\"} 0.250000"));
        assert!(text.contains("tidemark_seconds_since_last_success{source=\"county\"} 0."));
    }
}
