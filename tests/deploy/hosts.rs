//! The container build file and the systemd unit with its environment file.

use super::{port_of, read, serve_env, serve_flags};
use std::collections::BTreeMap;

/// The instructions of a Dockerfile: continuation lines joined, comments dropped.
fn instructions(text: &str) -> Vec<(String, String)> {
    let mut out = Vec::new();
    let mut pending = String::new();
    for line in text.lines() {
        let t = line.trim();
        if t.starts_with('#') || (t.is_empty() && pending.is_empty()) {
            continue;
        }
        match t.strip_suffix('\\') {
            Some(head) => pending.push_str(head),
            None => {
                pending.push_str(t);
                let (op, rest) = pending.split_once(' ').unwrap_or((&pending, ""));
                out.push((op.to_uppercase(), rest.trim().to_owned()));
                pending.clear();
            }
        }
    }
    out
}

fn exec_form(rest: &str) -> Vec<String> {
    serde_json::from_str(rest).unwrap_or_else(|e| panic!("{rest:?} is not exec form: {e}"))
}

#[test]
fn the_container_build_file_agrees_with_the_binary() {
    let all = instructions(&read("deploy/container/Dockerfile"));
    let stages = all.iter().filter(|(op, _)| op == "FROM").count();
    assert!(stages >= 2, "multi-stage");
    // The build stage's toolchain is at least the crate's rust-version.
    let builder = &all.iter().find(|(op, _)| op == "FROM").unwrap().1;
    let tag = builder
        .split(':')
        .nth(1)
        .unwrap()
        .split('-')
        .next()
        .unwrap();
    let manifest = read("Cargo.toml");
    let needed = manifest
        .lines()
        .find_map(|l| l.strip_prefix("rust-version = "))
        .unwrap()
        .trim_matches('"');
    let minor = |v: &str| -> u32 { v.split('.').nth(1).unwrap().parse().unwrap() };
    assert!(
        minor(tag) >= minor(needed),
        "rust {tag} < rust-version {needed}"
    );

    // The final stage: no shell, a fixed unprivileged user, the binary as entry point.
    let last = all.iter().rposition(|(op, _)| op == "FROM").unwrap();
    let fin = &all[last..];
    let get = |op: &str| {
        fin.iter()
            .rev()
            .find(|(o, _)| o == op)
            .map(|(_, r)| r.as_str())
    };
    assert!(fin[0]
        .1
        .starts_with("gcr.io/distroless/cc-debian12:nonroot"));
    let user = get("USER").expect("a USER in the final stage");
    let uid: u32 = user.split(':').next().unwrap().parse().unwrap();
    assert_ne!(uid, 0);
    // Kubernetes runs the pod as the same user.
    let k8s = read("deploy/kubernetes/deployment.yaml");
    assert!(
        k8s.contains(&format!("runAsUser: {uid}\n")),
        "runAsUser {uid}"
    );
    let entry = exec_form(get("ENTRYPOINT").unwrap());
    assert_eq!(entry.len(), 1);
    let copied = fin
        .iter()
        .filter(|(o, _)| o == "COPY")
        .any(|(_, r)| r.starts_with("--from=") && r.ends_with(&format!(" {}", entry[0])));
    assert!(copied, "{} is copied from the build stage", entry[0]);
    assert!(all
        .iter()
        .any(|(o, r)| o == "RUN" && r.contains("cargo build --release --locked")));

    // The default command parses, and the ports it listens on are the exposed ones.
    let flags = serve_flags(&exec_form(get("CMD").unwrap()));
    let exposed: Vec<i64> = get("EXPOSE")
        .unwrap()
        .split_whitespace()
        .map(|p| p.parse().unwrap())
        .collect();
    for flag in ["listen", "telemetry-listen"] {
        assert!(exposed.contains(&port_of(&flags[flag])), "{flag}");
    }
}

/// `Key=Value` lines of a unit (a key may repeat), or of an environment file.
fn assignments(text: &str, comments: bool) -> Vec<(String, String)> {
    text.lines()
        .map(str::trim)
        .filter_map(|l| match l.strip_prefix('#') {
            Some(c) if comments => Some(c.trim()),
            Some(_) => None,
            None => Some(l),
        })
        .filter_map(|l| l.split_once('='))
        .filter(|(k, _)| !k.contains(' ') && !k.is_empty())
        .map(|(k, v)| (k.to_owned(), v.to_owned()))
        .collect()
}

#[test]
fn the_systemd_unit_and_environment_file_agree_with_the_binary() {
    let unit = assignments(&read("deploy/systemd/candor.service"), false);
    let get = |k: &str| -> Vec<&str> {
        unit.iter()
            .filter(|(key, _)| key == k)
            .map(|(_, v)| v.as_str())
            .collect()
    };
    let one = |k: &str| -> &str { get(k).first().copied().unwrap_or_else(|| panic!("no {k}=")) };

    // Every CANDOR_* name, set or shown commented, is a serve flag's variable; the set ones,
    // written as flags after the ExecStart arguments, parse.
    let env_text = read("deploy/systemd/candor.env");
    let names = serve_env();
    let mut args: Vec<String> = one("ExecStart")
        .split_whitespace()
        .skip(1)
        .map(str::to_owned)
        .collect();
    for (k, v) in assignments(&env_text, true) {
        let (long, takes) = names
            .get(&k)
            .unwrap_or_else(|| panic!("{k} in candor.env is no serve flag's variable"));
        assert_ne!(
            k, "CANDOR_ADMIN_TOKEN",
            "the token belongs in a credential file"
        );
        if assignments(&env_text, false).iter().any(|(n, _)| *n == k) {
            if *takes {
                args.push(format!("--{long}={v}"));
            } else if v == "true" {
                args.push(format!("--{long}"));
            }
        }
    }
    let env: BTreeMap<String, String> = assignments(&env_text, false).into_iter().collect();
    assert!(one("ExecStart").starts_with("/usr/local/bin/candor "));
    assert!(one("EnvironmentFile").ends_with("/candor.env"));
    let flags = serve_flags(&args);

    // Hardening, restart and signals.
    for (k, want) in [
        ("ProtectSystem", "strict"),
        ("ProtectHome", "yes"),
        ("PrivateTmp", "yes"),
        ("NoNewPrivileges", "yes"),
        ("CapabilityBoundingSet", ""),
        ("DynamicUser", "yes"),
        ("Restart", "on-failure"),
        ("KillSignal", "SIGTERM"),
        ("ExecReload", "/bin/kill -HUP $MAINPID"),
        ("SystemCallFilter", "@system-service"),
        ("RestrictAddressFamilies", "AF_INET AF_INET6 AF_UNIX"),
    ] {
        assert!(get(k).contains(&want), "{k}={want} missing: {:?}", get(k));
    }
    let stop: u64 = one("TimeoutStopSec").parse().unwrap();
    let grace: u64 = flags["grace-period-secs"].parse().unwrap();
    assert!(stop > grace, "TimeoutStopSec {stop} ≤ grace period {grace}");

    // Paths: the journal in the state directory, the maps read-only, the token a credential.
    let state = format!("/var/lib/{}/", one("StateDirectory"));
    assert!(
        flags["journal-dir"].starts_with(&state),
        "{}",
        flags["journal-dir"]
    );
    assert!(get("ReadOnlyPaths").contains(&flags["maps"].as_str()));
    let (credential, _) = one("LoadCredential").split_once(':').unwrap();
    assert_eq!(
        flags["admin-token-file"],
        format!("/run/credentials/candor.service/{credential}")
    );
    assert_eq!(env["CANDOR_MAPS"], flags["maps"]);
}
