//! The live page in a real headless browser (Debian's chromium and chromium-driver, driven over
//! WebDriver): the overview lists the characteristics, a violation fed to the daemon shows on
//! an open page within 2 seconds without a reload, the characteristic's page says what fired,
//! what to check first and how to acknowledge, and the cell monitor turns red. Screenshots go
//! to target/page-*.png for people to look at. A technician logs in and acknowledges from the
//! page, and the archive holds the acknowledgement with their name.

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use fantoccini::{ClientBuilder, Locator};

mod common;
use common::peers::{free_port, wait_for_port};

fn cell(dir: &Path, port: u16, web: &str) -> std::path::PathBuf {
    std::fs::write(dir.join("bore.toml"), common::BORE_LIMITS).unwrap();
    std::fs::create_dir_all(dir.join("inbox")).unwrap();
    let text = format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2
cell = "Cell 7 (test)"

[[characteristic]]
id = "bore"
name = "Bore diameter"
unit = "mm"
limits = "bore.toml"
subgroup = {{ size = 4 }}
reaction_plan = "Check the boring insert for wear; measure the last part on the bench gauge."
[characteristic.rules]
preset = "western-electric"

[[characteristic]]
id = "face"
name = "Face height"
unit = "mm"
subgroup = {{ size = 1 }}
learning = {{ subgroups = 20 }}

[[source]]
id = "cmm"
kind = "folder"
path = "inbox"
rows = "per-part"
columns = {{ "Bore" = "bore", "Face" = "face" }}
part_column = "Serial"
settle_ms = 20

[web]
listen = "127.0.0.1:{port}"
{web}
"#
    );
    let p = dir.join("cell.toml");
    std::fs::write(&p, text).unwrap();
    p
}

fn report(dir: &Path, name: &str, from: usize, bore: f64) {
    let mut s = String::from("Serial,Bore,Face\n");
    for i in from..from + 4 {
        s.push_str(&format!(
            "VB{i:04},{bore},{}\n",
            38.2 + (i % 3) as f64 * 0.001
        ));
    }
    let tmp = dir.join("inbox").join(format!("{name}.tmp"));
    std::fs::write(&tmp, s).unwrap();
    std::fs::rename(&tmp, dir.join("inbox").join(format!("{name}.csv"))).unwrap();
}

struct Driver(Child);

impl Drop for Driver {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// chromedriver on a free port, or None (the test is skipped unless CI requires it).
fn chromedriver() -> Option<(Driver, u16)> {
    let port = free_port();
    match Command::new("chromedriver")
        .arg(format!("--port={port}"))
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
    {
        Ok(c) => {
            wait_for_port(port);
            Some((Driver(c), port))
        }
        Err(_) => {
            assert!(
                std::env::var("LINEWARDEN_REQUIRE_CHROMIUM").is_err(),
                "chromedriver is required (apt-get install chromium-driver)"
            );
            eprintln!("SKIPPED: chromedriver is not installed (apt-get install chromium-driver)");
            None
        }
    }
}

async fn browser(driver_port: u16) -> fantoccini::Client {
    let mut caps = serde_json::Map::new();
    caps.insert(
        "goog:chromeOptions".into(),
        serde_json::json!({
            "args": ["--headless=new", "--no-sandbox", "--disable-gpu",
                     "--disable-dev-shm-usage", "--window-size=1280,900"]
        }),
    );
    ClientBuilder::rustls()
        .unwrap()
        .capabilities(caps)
        .connect(&format!("http://127.0.0.1:{driver_port}"))
        .await
        .unwrap()
}

/// The class of the element `css` selects, read in the page (the live part is replaced as it
/// updates, so no element handle is kept).
async fn class_of(c: &fantoccini::Client, css: &str) -> String {
    let v = c
        .execute(
            "const e = document.querySelector(arguments[0]); return e ? e.className : '';",
            vec![serde_json::json!(css)],
        )
        .await
        .unwrap();
    v.as_str().unwrap_or_default().to_string()
}

/// The visible text of the element `css` selects.
async fn text_of(c: &fantoccini::Client, css: &str) -> String {
    let v = c
        .execute(
            "const e = document.querySelector(arguments[0]); return e ? e.innerText : '';",
            vec![serde_json::json!(css)],
        )
        .await
        .unwrap();
    v.as_str().unwrap_or_default().to_string()
}

/// Waits up to 5 s for the element `css` to show a text containing `want` (after a click, the
/// next page takes a moment to come).
async fn until_text(c: &fantoccini::Client, css: &str, want: &str) {
    let start = Instant::now();
    loop {
        let text = text_of(c, css).await;
        if text.contains(want) {
            return;
        }
        assert!(
            start.elapsed() < Duration::from_secs(5),
            "{want:?} not in {css}: {text:?}; the page: {}",
            text_of(c, "body").await
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

async fn shot(c: &fantoccini::Client, name: &str) {
    let png = c.screenshot().await.unwrap();
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("target");
    let _ = std::fs::create_dir_all(&dir);
    std::fs::write(dir.join(format!("page-{name}.png")), png).unwrap();
}

#[test]
fn a_violation_shows_on_an_open_page_within_two_seconds_without_a_reload() {
    let Some((_driver, driver_port)) = chromedriver() else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let cfg = cell(dir.path(), port, "");
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    let d = dir.path().to_path_buf();
    report(&d, "r1", 0, 12.001);
    common::wait("the first subgroup", Duration::from_secs(20), || {
        d.join("inbox/done/r1.csv").exists()
    });
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let c = browser(driver_port).await;
        let base = format!("http://127.0.0.1:{port}");
        c.goto(&format!("{base}/")).await.unwrap();
        // The overview lists both characteristics, in plain words.
        let start = Instant::now();
        loop {
            let text = text_of(&c, "main").await;
            if text.contains("Bore diameter") && text.contains("In control") {
                assert!(
                    text.contains("Face height") && text.contains("Learning its limits"),
                    "{text}"
                );
                break;
            }
            assert!(
                start.elapsed() < Duration::from_secs(10),
                "overview: {text}"
            );
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        assert!(
            class_of(&c, "section[data-characteristic=bore]")
                .await
                .contains("ok")
        );
        shot(&c, "overview-in-control").await;
        // A mark that a reload would wipe.
        c.execute("window.__mark = 'still here'; return 1;", vec![])
            .await
            .unwrap();

        // The bore shifts far above its limits.
        report(&d, "r2", 4, 12.02);
        let d2 = d.clone();
        tokio::task::spawn_blocking(move || {
            common::wait("the second report read", Duration::from_secs(20), || {
                d2.join("inbox/done/r2.csv").exists()
            })
        })
        .await
        .unwrap();
        let seen = Instant::now();
        loop {
            if class_of(&c, "section[data-characteristic=bore]")
                .await
                .contains("act")
            {
                break;
            }
            assert!(
                seen.elapsed() < Duration::from_secs(2),
                "the page did not show the violation within 2 s"
            );
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        let mark = c
            .execute("return window.__mark || null;", vec![])
            .await
            .unwrap();
        assert_eq!(
            mark,
            serde_json::json!("still here"),
            "the page was reloaded"
        );
        let text = text_of(&c, "main").await;
        assert!(text.contains("ACT NOW"), "{text}");
        let light = text_of(&c, "#light").await;
        assert!(light.contains("ACT NOW"), "the header's light: {light}");
        shot(&c, "overview-act-now").await;

        // The characteristic's page: what fired, the parts, what to check first, how to
        // acknowledge, the chart.
        c.goto(&format!("{base}/c/bore")).await.unwrap();
        let text = text_of(&c, "main").await;
        for want in [
            "beyond-limits",
            "above the upper control limit",
            "What to check first: Check the boring insert",
            "linewarden ack bore-2-beyond-limits-up --by NAME",
            "Recent subgroups",
        ] {
            assert!(text.contains(want), "{want:?} in\n{text}");
        }
        assert!(c.find(Locator::Css("main svg")).await.is_ok(), "a chart");
        shot(&c, "characteristic").await;

        // The cell monitor.
        c.goto(&format!("{base}/monitor")).await.unwrap();
        assert!(
            class_of(&c, "section[data-characteristic=bore]")
                .await
                .contains("act")
        );
        shot(&c, "monitor").await;

        // A name that is not a characteristic.
        c.goto(&format!("{base}/c/%3Cscript%3E")).await.unwrap();
        let text = text_of(&c, "main").await;
        assert!(
            text.contains("No characteristic is called \"<script>\""),
            "{text}"
        );
        c.close().await.unwrap();
    });
    daemon.stop();
}

/// The bore's alert, acknowledged from the page by a logged-in technician: a wrong password is
/// refused, the right one brings them back where they were, the note they type is not wiped by
/// the page's live updates, and the archive records the acknowledgement with their name.
#[test]
fn a_technician_logs_in_on_the_page_and_acknowledges_and_the_archive_holds_it() {
    use linewarden::alerts::AlertEvent;
    use linewarden::archive::reader::{Filter, Reader};
    use linewarden::archive::record::Record;
    let Some((_driver, driver_port)) = chromedriver() else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path().to_path_buf();
    let hash = linewarden::daemon::access::hash_password("night-shift-7").unwrap();
    std::fs::write(
        d.join("users"),
        format!("# who may acknowledge\ndana:{hash}\n"),
    )
    .unwrap();
    let port = free_port();
    let cfg = cell(&d, port, "users = \"users\"");
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    report(&d, "r1", 0, 12.001);
    report(&d, "r2", 4, 12.02);
    common::wait("both reports", Duration::from_secs(20), || {
        d.join("inbox/done/r2.csv").exists()
    });
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let c = browser(driver_port).await;
        let base = format!("http://127.0.0.1:{port}");
        c.goto(&format!("{base}/c/bore")).await.unwrap();
        let start = Instant::now();
        while !text_of(&c, "main").await.contains("beyond-limits") {
            assert!(start.elapsed() < Duration::from_secs(10), "no alert shown");
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        // Not logged in: the way to log in, and no form.
        assert!(c.find(Locator::Css("form.ack")).await.is_err());
        c.find(Locator::LinkText("Log in to acknowledge"))
            .await
            .unwrap()
            .click()
            .await
            .unwrap();
        let login = |user: &'static str, pw: &'static str| {
            let c = c.clone();
            async move {
                c.find(Locator::Css("input[name=user]"))
                    .await
                    .unwrap()
                    .send_keys(user)
                    .await
                    .unwrap();
                c.find(Locator::Css("input[name=password]"))
                    .await
                    .unwrap()
                    .send_keys(pw)
                    .await
                    .unwrap();
                c.find(Locator::Css("form.login button"))
                    .await
                    .unwrap()
                    .click()
                    .await
                    .unwrap();
            }
        };
        login("dana", "night-shift-8").await;
        until_text(&c, "#refused", "Wrong name or password.").await;
        shot(&c, "login-refused").await;
        login("dana", "night-shift-7").await;
        // Back on the characteristic's page, logged in.
        until_text(&c, "header .who", "Logged in as dana").await;
        assert_eq!(c.current_url().await.unwrap().path(), "/c/bore");
        // A note being typed survives the live updates that come meanwhile.
        let note = c.find(Locator::Css("form.ack input[name=note]")).await.unwrap();
        note.send_keys("insert worn, changed; first part measured 12.001").await.unwrap();
        report(&d, "r3", 8, 12.001);
        let d2 = d.clone();
        tokio::task::spawn_blocking(move || {
            common::wait("the third report", Duration::from_secs(20), || {
                d2.join("inbox/done/r3.csv").exists()
            })
        })
        .await
        .unwrap();
        tokio::time::sleep(Duration::from_millis(2500)).await;
        let typed = c
            .execute(
                "const e = document.querySelector('form.ack input[name=note]'); return e ? e.value : null;",
                vec![],
            )
            .await
            .unwrap();
        assert_eq!(
            typed,
            serde_json::json!("insert worn, changed; first part measured 12.001"),
            "the note was wiped by a live update"
        );
        shot(&c, "acknowledge-form").await;
        c.find(Locator::Css("form.ack button"))
            .await
            .unwrap()
            .click()
            .await
            .unwrap();
        until_text(
            &c,
            "#acked",
            "bore-2-beyond-limits-up is acknowledged by dana",
        )
        .await;
        assert!(c.find(Locator::Css("form.ack")).await.is_err(), "still a form");
        // The card says so as the page comes back (the condition was gone: the alert is over).
        assert_eq!(text_of(&c, "main .state").await, "In control");
        shot(&c, "acknowledged").await;
        // Logging out ends the session: the page offers the login again.
        c.find(Locator::Css("header form button"))
            .await
            .unwrap()
            .click()
            .await
            .unwrap();
        until_text(&c, "header .who", "Log in to acknowledge").await;
        c.close().await.unwrap();
    });
    daemon.stop();
    let r = Reader::open(&d.join("archive")).unwrap();
    let acks: Vec<(String, String, Option<String>)> = r
        .iter(&Filter::default())
        .flatten()
        .filter_map(|e| match e.record {
            Record::Alert {
                alert_id,
                event: AlertEvent::Acknowledged { by, note, .. },
                ..
            } => Some((alert_id, by, note)),
            _ => None,
        })
        .collect();
    assert_eq!(
        acks,
        vec![(
            "bore-2-beyond-limits-up".to_string(),
            "dana".to_string(),
            Some("insert worn, changed; first part measured 12.001".to_string())
        )]
    );
}
