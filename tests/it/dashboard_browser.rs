//! The dashboard in a real browser: a demo store (the invented scenario, 30 days) is served
//! on loopback, headless Chromium is driven through chromedriver's W3C WebDriver protocol
//! (plain HTTP with reqwest), and the test checks that every chart's SVG is there with data
//! marks, switches the as-of selector to an earlier snapshot and submits the form, checks
//! that the charts changed, and saves screenshots (their paths are printed).
//!
//! Without /usr/bin/chromium and /usr/bin/chromedriver the test prints a skip line and
//! passes, unless `TIDEMARK_REQUIRE_BROWSER` is set (as `.ci/run` does), when it fails.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use serde_json::{Value, json};
use tokio_util::sync::CancellationToken;

use tidemark::app::demo::{self, DemoOptions};
use tidemark::config::Config;
use tidemark::demo::COUNTY_SOURCE;
use tidemark::serve::dashboard::{self, CAUTION, DashboardState};

use crate::support::TestResult;

const CHROMIUM: &str = "/usr/bin/chromium";
const CHROMEDRIVER: &str = "/usr/bin/chromedriver";

/// The charts every source page of the demo must draw, by SVG id.
const CHARTS: [&str; 5] = ["chart-onset", "chart-report", "chart-delay", "chart-lag", "chart-missing"];

/// Counts the data marks in each chart (elements under a `g.data` group).
const COUNT_MARKS: &str = "return Array.from(document.querySelectorAll('svg.chart')).map(function (svg) { \
     return [svg.id, svg.querySelectorAll('g.data rect, g.data polyline, g.data polygon, g.data circle, g.data path').length, \
             svg.querySelector('title') ? svg.querySelector('title').textContent : '']; });";

#[test]
fn the_dashboard_draws_every_chart_in_chromium_and_redraws_as_of_an_earlier_snapshot() -> TestResult {
    if !Path::new(CHROMIUM).exists() || !Path::new(CHROMEDRIVER).exists() {
        assert!(
            std::env::var_os("TIDEMARK_REQUIRE_BROWSER").is_none(),
            "TIDEMARK_REQUIRE_BROWSER is set but {CHROMIUM} or {CHROMEDRIVER} is missing (apt-get install chromium chromium-driver)"
        );
        println!("SKIPPED dashboard_browser: {CHROMIUM} or {CHROMEDRIVER} not installed");
        return Ok(());
    }
    let dir = tempfile::tempdir()?;
    let options = DemoOptions { dir: dir.path().join("demo"), seed: 3, days: 30 };
    demo::run(&options, &mut |_| {})?;
    let config = Config::load(&options.dir.join("tidemark.toml"))?;
    let shots = tempfile::Builder::new().prefix("tidemark-dashboard-shots-").tempdir()?.keep();
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build()?;
    runtime.block_on(drive_browser(config.store.path.clone(), dir.path(), &shots))
}

async fn drive_browser(store: PathBuf, scratch: &Path, shots: &Path) -> TestResult {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let base = format!("http://{}", listener.local_addr()?);
    let shutdown = CancellationToken::new();
    let server = tokio::spawn(tidemark::serve::serve(
        listener,
        dashboard::router(DashboardState::new(store, &tidemark::config::AnalysisConfig::default())),
        shutdown.clone(),
    ));
    let driver = Driver::start(scratch).await?;
    let result = check_pages(&driver, &base, shots).await;
    driver.stop().await;
    shutdown.cancel();
    server.await??;
    result
}

async fn check_pages(driver: &Driver, base: &str, shots: &Path) -> TestResult {
    driver.navigate(&format!("{base}/")).await?;
    let index = driver.script("return document.body.innerText;").await?;
    assert!(
        index.as_str().unwrap_or_default().contains(COUNTY_SOURCE),
        "the index lists the demo source: {index}"
    );
    driver.navigate(&format!("{base}/sources/{COUNTY_SOURCE}")).await?;
    let latest = chart_marks(driver).await?;
    let latest_onset = driver.script("return document.getElementById('chart-onset').outerHTML;").await?;
    let shown_latest = driver.script("return document.getElementById('shown').textContent;").await?;
    let body = driver.script("return document.body.innerText;").await?;
    assert!(body.as_str().unwrap_or_default().contains("Alerts are statistical signals"), "caution shown");
    assert!(CAUTION.contains("not confirmed outbreaks"));
    let nowcast_marks = driver
        .script("return document.querySelectorAll('#chart-onset g.nowcast-median polyline, #chart-onset g.nowcast-band polygon').length;")
        .await?;
    assert_eq!(nowcast_marks, json!(2), "the onset chart has the nowcast median line and its 90% band");
    let first = shots.join("dashboard-latest.png");
    driver.screenshot(&first).await?;
    println!("screenshot: {}", first.display());

    // Pick the 8th-newest snapshot in the selector and submit the form, as a user would.
    let option = driver.find("#as_of option:nth-child(8)").await?;
    let chosen = driver.property(&option, "value").await?;
    driver.click(&option).await?;
    let button = driver.find("#redraw").await?;
    driver.click(&button).await?;
    driver.wait_for_url_containing("as_of=").await?;
    let earlier = chart_marks(driver).await?;
    let earlier_onset = driver.script("return document.getElementById('chart-onset').outerHTML;").await?;
    let shown_earlier = driver.script("return document.getElementById('shown').textContent;").await?;
    let selected = driver.script("return document.getElementById('as_of').value;").await?;
    assert_eq!(selected, chosen, "the page is drawn as of the chosen snapshot");
    assert_ne!(shown_earlier, shown_latest);
    assert!(shown_earlier.as_str().unwrap_or_default().contains(chosen.as_str().unwrap_or("?")));
    assert_ne!(earlier_onset, latest_onset, "the onset chart is redrawn as of the earlier snapshot");
    assert_ne!(earlier, latest, "the charts' data marks change with the as-of snapshot");
    let second = shots.join("dashboard-earlier.png");
    driver.screenshot(&second).await?;
    println!("screenshot: {}", second.display());
    println!("data marks, latest: {latest:?}; as of {chosen}: {earlier:?}");
    Ok(())
}

/// (chart id, data marks) for every chart on the page; asserts every chart is there with a
/// title and at least one data mark.
async fn chart_marks(driver: &Driver) -> Result<Vec<(String, u64)>, Box<dyn std::error::Error>> {
    let value = driver.script(COUNT_MARKS).await?;
    let mut out = Vec::new();
    for entry in value.as_array().cloned().unwrap_or_default() {
        let id = entry[0].as_str().unwrap_or_default().to_string();
        let marks = entry[1].as_u64().unwrap_or(0);
        assert!(!entry[2].as_str().unwrap_or_default().is_empty(), "{id} has a <title>");
        out.push((id, marks));
    }
    for chart in CHARTS {
        let marks = out.iter().find(|(id, _)| id == chart).map(|(_, n)| *n);
        assert!(marks.unwrap_or(0) > 0, "{chart} is on the page with data marks: {out:?}");
    }
    Ok(out)
}

/// A chromedriver process and one browser session.
struct Driver {
    process: Child,
    http: reqwest::Client,
    url: String,
    session: String,
}

/// How long chromedriver and page loads may take on a busy machine.
const DRIVER_WAIT: Duration = Duration::from_secs(30);

impl Driver {
    async fn start(scratch: &Path) -> Result<Driver, Box<dyn std::error::Error>> {
        let port = std::net::TcpListener::bind("127.0.0.1:0")?.local_addr()?.port();
        let process = Command::new(CHROMEDRIVER)
            .arg(format!("--port={port}"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()?;
        let http = reqwest::Client::builder().timeout(DRIVER_WAIT * 2).build()?;
        let url = format!("http://127.0.0.1:{port}");
        let started = Instant::now();
        loop {
            if let Ok(response) = http.get(format!("{url}/status")).send().await
                && response.status().is_success()
            {
                break;
            }
            if started.elapsed() > DRIVER_WAIT {
                return Err("chromedriver did not start".into());
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        let profile = scratch.join("chromium-profile");
        let capabilities = json!({"capabilities": {"alwaysMatch": {
            "browserName": "chrome",
            "goog:chromeOptions": {
                "binary": CHROMIUM,
                "args": ["--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                         "--window-size=1100,2600", format!("--user-data-dir={}", profile.display())]
            }
        }}});
        let mut driver = Driver { process, http, url, session: String::new() };
        let created = driver.call(reqwest::Method::POST, "/session", Some(capabilities)).await?;
        driver.session = created["sessionId"].as_str().ok_or("no session id")?.to_string();
        Ok(driver)
    }

    async fn call(
        &self,
        method: reqwest::Method,
        path: &str,
        body: Option<Value>,
    ) -> Result<Value, Box<dyn std::error::Error>> {
        let mut request = self.http.request(method, format!("{}{path}", self.url));
        if let Some(body) = body {
            request = request.header("content-type", "application/json").body(serde_json::to_vec(&body)?);
        }
        let response = request.send().await?;
        let status = response.status();
        let value: Value = serde_json::from_slice(&response.bytes().await?)?;
        if !status.is_success() {
            return Err(format!("webdriver {path}: {status}: {}", value["value"]).into());
        }
        Ok(value["value"].clone())
    }

    fn session_path(&self, rest: &str) -> String {
        format!("/session/{}{rest}", self.session)
    }

    async fn navigate(&self, url: &str) -> Result<(), Box<dyn std::error::Error>> {
        self.call(reqwest::Method::POST, &self.session_path("/url"), Some(json!({ "url": url }))).await?;
        Ok(())
    }

    async fn script(&self, script: &str) -> Result<Value, Box<dyn std::error::Error>> {
        let body = json!({ "script": script, "args": [] });
        self.call(reqwest::Method::POST, &self.session_path("/execute/sync"), Some(body)).await
    }

    async fn find(&self, css: &str) -> Result<String, Box<dyn std::error::Error>> {
        let body = json!({ "using": "css selector", "value": css });
        let found = self.call(reqwest::Method::POST, &self.session_path("/element"), Some(body)).await?;
        let id = found
            .as_object()
            .and_then(|o| o.values().next())
            .and_then(Value::as_str)
            .ok_or("no element id")?;
        Ok(id.to_string())
    }

    async fn property(&self, element: &str, name: &str) -> Result<Value, Box<dyn std::error::Error>> {
        self.call(
            reqwest::Method::GET,
            &self.session_path(&format!("/element/{element}/property/{name}")),
            None,
        )
        .await
    }

    async fn click(&self, element: &str) -> Result<(), Box<dyn std::error::Error>> {
        self.call(
            reqwest::Method::POST,
            &self.session_path(&format!("/element/{element}/click")),
            Some(json!({})),
        )
        .await?;
        Ok(())
    }

    async fn wait_for_url_containing(&self, part: &str) -> Result<(), Box<dyn std::error::Error>> {
        let started = Instant::now();
        loop {
            let url = self.call(reqwest::Method::GET, &self.session_path("/url"), None).await?;
            let ready = self.script("return document.readyState;").await?;
            if url.as_str().unwrap_or_default().contains(part) && ready == json!("complete") {
                return Ok(());
            }
            if started.elapsed() > DRIVER_WAIT {
                return Err(format!("the page did not navigate to a URL with {part}: {url}").into());
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
    }

    async fn screenshot(&self, path: &Path) -> Result<(), Box<dyn std::error::Error>> {
        let encoded = self.call(reqwest::Method::GET, &self.session_path("/screenshot"), None).await?;
        let png = base64_decode(encoded.as_str().ok_or("screenshot is not text")?)?;
        assert!(png.starts_with(b"\x89PNG"), "the screenshot is a PNG");
        std::fs::write(path, png)?;
        Ok(())
    }

    async fn stop(mut self) {
        let _ = self.call(reqwest::Method::DELETE, &self.session_path(""), None).await;
        let _ = self.process.kill();
        let _ = self.process.wait();
    }
}

/// Standard base64 (RFC 4648) with padding, as WebDriver returns screenshots.
fn base64_decode(text: &str) -> Result<Vec<u8>, String> {
    let value = |c: u8| -> Result<u32, String> {
        Ok(match c {
            b'A'..=b'Z' => c - b'A',
            b'a'..=b'z' => c - b'a' + 26,
            b'0'..=b'9' => c - b'0' + 52,
            b'+' => 62,
            b'/' => 63,
            other => return Err(format!("not base64: {:?}", other as char)),
        } as u32)
    };
    let bytes: Vec<u8> = text.bytes().filter(|c| !c.is_ascii_whitespace()).collect();
    let mut out = Vec::with_capacity(bytes.len() / 4 * 3);
    for chunk in bytes.chunks(4) {
        let pad = chunk.iter().rev().take_while(|c| **c == b'=').count();
        let mut n = 0u32;
        for &c in &chunk[..chunk.len() - pad] {
            n = (n << 6) | value(c)?;
        }
        n <<= 6 * (4 - (chunk.len() - pad)) as u32;
        let decoded = [(n >> 16) as u8, (n >> 8) as u8, n as u8];
        out.extend_from_slice(&decoded[..3 - pad.min(2)]);
    }
    Ok(out)
}

#[test]
fn base64_decoding_matches_rfc_4648_examples() {
    // RFC 4648 section 10 test vectors.
    for (plain, encoded) in [
        ("", ""),
        ("f", "Zg=="),
        ("fo", "Zm8="),
        ("foo", "Zm9v"),
        ("foob", "Zm9vYg=="),
        ("foobar", "Zm9vYmFy"),
    ] {
        assert_eq!(base64_decode(encoded).unwrap(), plain.as_bytes(), "{encoded}");
    }
}
