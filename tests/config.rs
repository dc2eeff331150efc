//! `candor serve --config` and `--print-config` on the real binary: each precedence level,
//! redaction of the admin token, the printed file read back, unknown keys refused, and a server
//! started from a file alone.

use crate::support::{candor, temperature_map, terminate};
use candor::proto::v1::calibrator_client::CalibratorClient;
use candor::proto::v1::CalibrateRequest;
use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::{Child, Command, Stdio};

/// Every CANDOR_* variable the tests set, removed first so the caller's environment cannot leak in.
const VARS: [&str; 4] = [
    "CANDOR_CONFIG",
    "CANDOR_RESCAN_SECS",
    "CANDOR_ADMIN_TOKEN",
    "CANDOR_AUDIT_RATE",
];

fn serve_cmd() -> Command {
    let mut c = candor();
    for v in VARS {
        c.env_remove(v);
    }
    c.arg("serve");
    c
}

/// Runs `--print-config` and returns its standard output; panics unless it exits 0.
fn print_config(c: &mut Command) -> String {
    let out = c.arg("--print-config").output().unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

/// The printed line of `key`, e.g. `rescan-secs = 5  # default`.
fn line<'a>(printed: &'a str, key: &str) -> &'a str {
    printed
        .lines()
        .find(|l| l.starts_with(&format!("{key} = ")))
        .unwrap_or_else(|| panic!("no {key} in\n{printed}"))
}

fn write(dir: &Path, name: &str, text: &str) -> std::path::PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

#[test]
fn each_precedence_level_wins_over_the_ones_below() {
    let dir = tempfile::tempdir().unwrap();
    let file = write(dir.path(), "c.toml", "rescan-secs = 9\naudit-rate = 0.25\n");
    // default
    let p = print_config(&mut serve_cmd());
    assert_eq!(line(&p, "rescan-secs"), "rescan-secs = 5  # default");
    // file over default
    let p = print_config(serve_cmd().arg("--config").arg(&file));
    assert_eq!(line(&p, "rescan-secs"), "rescan-secs = 9  # file");
    assert_eq!(line(&p, "audit-rate"), "audit-rate = 0.25  # file");
    // the file's path from the environment works the same
    let p = print_config(serve_cmd().env("CANDOR_CONFIG", &file));
    assert_eq!(line(&p, "rescan-secs"), "rescan-secs = 9  # file");
    // env over file
    let p = print_config(
        serve_cmd()
            .env("CANDOR_RESCAN_SECS", "7")
            .arg("--config")
            .arg(&file),
    );
    assert_eq!(line(&p, "rescan-secs"), "rescan-secs = 7  # env");
    assert_eq!(line(&p, "audit-rate"), "audit-rate = 0.25  # file");
    // flag over env
    let p = print_config(
        serve_cmd()
            .env("CANDOR_RESCAN_SECS", "7")
            .args(["--rescan-secs", "3", "--config"])
            .arg(&file),
    );
    assert_eq!(line(&p, "rescan-secs"), "rescan-secs = 3  # flag");
}

#[test]
fn the_admin_token_is_never_printed() {
    const SECRET: &str = "s3cr3t-token-value-0123456789";
    let dir = tempfile::tempdir().unwrap();
    let file = write(
        dir.path(),
        "c.toml",
        &format!("admin-token = \"{SECRET}\"\n"),
    );
    for cmd in [
        serve_cmd().env("CANDOR_ADMIN_TOKEN", SECRET),
        serve_cmd().args(["--admin-token", SECRET]),
        serve_cmd().arg("--config").arg(&file),
    ] {
        let p = print_config(cmd);
        assert!(!p.contains(SECRET), "{p}");
        assert!(p.contains("# admin-token = \"<redacted>\""), "{p}");
    }
}

#[test]
fn the_printed_configuration_reads_back_to_the_same_values() {
    let dir = tempfile::tempdir().unwrap();
    let first = print_config(serve_cmd().args([
        "--maps",
        "/some/store",
        "--rescan-secs",
        "11",
        "--no-file-events",
        "--audit-rate",
        "0.125",
        "--log",
        "candor=debug,-weird",
        "--telemetry-listen",
        "127.0.0.1:9090",
    ]));
    let file = write(dir.path(), "printed.toml", &first);
    let second = print_config(serve_cmd().arg("--config").arg(&file));
    // Values equal; only the source comments differ (everything set now comes from the file).
    let values = |p: &str| -> Vec<String> {
        p.lines()
            .filter(|l| !l.starts_with('#'))
            .map(|l| l.split("  #").next().unwrap().to_owned())
            .collect()
    };
    assert_eq!(values(&first), values(&second));
    assert!(values(&first).contains(&"no-file-events = true".to_owned()));
    assert_eq!(line(&second, "maps"), "maps = \"/some/store\"  # file");
    assert_eq!(
        line(&second, "log"),
        "log = \"candor=debug,-weird\"  # file"
    );
}

#[test]
fn unknown_keys_and_bad_values_are_refused_naming_the_key_and_the_file() {
    let dir = tempfile::tempdir().unwrap();
    for (text, wanted) in [
        (
            "rescan-secs = 5\nlisten-on = \"x\"\n",
            "unknown key \"listen-on\"",
        ),
        ("rescan_secs = 5\n", "unknown key \"rescan_secs\""),
        ("config = \"other.toml\"\n", "unknown key \"config\""),
        ("rescan-secs = 0\n", "--rescan-secs"),
        (
            "no-file-events = \"yes\"\n",
            "no-file-events must be true or false",
        ),
        (
            "rescan-secs = [1]\n",
            "rescan-secs must be a string or a number",
        ),
        ("rescan-secs = \n", "not valid TOML"),
    ] {
        let file = write(dir.path(), "bad.toml", text);
        let out = serve_cmd()
            .arg("--config")
            .arg(&file)
            .arg("--print-config")
            .output()
            .unwrap();
        assert_eq!(out.status.code(), Some(2), "{text}");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(err.contains(wanted), "{text}: {err}");
        assert!(err.contains(&file.display().to_string()), "{text}: {err}");
    }
}

/// Spawns `candor serve` with JSON logs and returns the child and the data-plane address from
/// its "listening" line; the rest of standard error is drained by a thread.
pub fn spawn_serve(cmd: &mut Command) -> (Child, String) {
    let mut child = cmd.stderr(Stdio::piped()).spawn().unwrap();
    let mut lines = BufReader::new(child.stderr.take().unwrap()).lines();
    let addr = loop {
        let line = lines
            .next()
            .expect("serve exited before listening")
            .unwrap();
        let Ok(v) = serde_json::from_str::<serde_json::Value>(&line) else {
            panic!("not a JSON log line: {line}");
        };
        if v["fields"]["message"] == "listening" {
            break v["fields"]["addr"].as_str().unwrap().to_owned();
        }
    };
    std::thread::spawn(move || lines.map_while(Result::ok).for_each(drop));
    (child, addr)
}

#[tokio::test]
async fn a_server_runs_from_the_config_file_alone() {
    let dir = tempfile::tempdir().unwrap();
    let maps = dir.path().join("maps");
    std::fs::create_dir(&maps).unwrap();
    std::fs::write(maps.join("triage.json"), temperature_map().to_json()).unwrap();
    let file = write(
        dir.path(),
        "c.toml",
        &format!(
            "maps = {:?}\nlisten = \"127.0.0.1:0\"\nadmin-listen = \"off\"\nlog-format = \"json\"\n",
            maps.display().to_string()
        ),
    );
    let (child, addr) = spawn_serve(serve_cmd().arg("--config").arg(&file));
    let channel = crate::support::connect_when_serving(&addr).await;
    let r = CalibratorClient::new(channel)
        .calibrate(CalibrateRequest {
            model: "triage".into(),
            logits: vec![4.0, 0.0, 0.0],
            request_id: "x".into(),
            ..CalibrateRequest::default()
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(r.predicted_class, 0);
    assert_eq!(terminate(child).await, Some(0));
}
