//! Rolling maps out: the watched store, the admin plane, canary, shadow and pinning, and the
//! `candor maps` command against a running sidecar.

use crate::support::{
    candor, versioned_map, wait_for_active, write_atomically, AdminPlane, Sidecar,
};
use candor::proto::v1::{
    ActivateRequest, CalibrateRequest, ListModelsRequest, PushMapRequest, Route, SetCanaryRequest,
    SetShadowRequest, VersionState,
};
use candor::registry::{spawn_store_watcher, Registry, WatchOptions, POINTER_FILE};
use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::Stdio;
use std::time::{Duration, Instant};
use tonic::Code;

/// Pickup bound the issue sets for the file watcher.
const PICKUP: Duration = Duration::from_secs(1);

/// A store registry with its watcher; the periodic rescan is an hour so that only file events
/// can explain a pickup within [`PICKUP`].
fn watched(dir: &Path) -> (std::sync::Arc<Registry>, tokio::sync::oneshot::Sender<()>) {
    let registry = Registry::with_store(dir);
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    spawn_store_watcher(
        registry.clone(),
        WatchOptions {
            rescan_interval: Duration::from_secs(3600),
            ..WatchOptions::default()
        },
        async {
            let _ = rx.await;
        },
    );
    (registry, tx)
}

/// `msg` with the test token as a bearer header.
fn with<T>(msg: T) -> tonic::Request<T> {
    let mut r = tonic::Request::new(msg);
    r.metadata_mut()
        .insert("authorization", "Bearer tok-123".parse().unwrap());
    r
}

fn req(model: &str, id: &str, pin: &str) -> CalibrateRequest {
    CalibrateRequest {
        model: model.into(),
        logits: vec![2.0, 0.5, 0.0],
        request_id: id.into(),
        map_version: pin.into(),
        ..CalibrateRequest::default()
    }
}

#[tokio::test]
async fn the_watcher_picks_up_atomic_renames_in_place_edits_and_pointer_changes() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    write_atomically(
        &d.join("triage/v1.json"),
        versioned_map("triage", "v1", 3, 2.0).to_json().as_bytes(),
    );
    let (registry, stop) = watched(d);
    assert!(wait_for_active(&registry, "triage", "v1", PICKUP).await);

    // A new version by atomic rename, made active by the pointer file.
    let t = Instant::now();
    write_atomically(
        &d.join("triage/v2.json"),
        versioned_map("triage", "v2", 3, 1.5).to_json().as_bytes(),
    );
    write_atomically(&d.join("triage").join(POINTER_FILE), b"v2\n");
    assert!(
        wait_for_active(&registry, "triage", "v2", PICKUP).await,
        "not picked up within {PICKUP:?}"
    );
    eprintln!("atomic rename picked up in {:?}", t.elapsed());

    // An editor writing in place, in two steps: the half-written file is refused, the old
    // version keeps serving, the finished file is picked up.
    let v3 = versioned_map("triage", "v3", 3, 1.2).to_json();
    std::fs::write(d.join("triage/v3.json"), &v3[..v3.len() / 3]).unwrap();
    std::fs::write(d.join("triage").join(POINTER_FILE), b"v3\n").unwrap();
    let mut gens = registry.generations();
    std::fs::write(d.join("triage/v3.json"), &v3).unwrap();
    assert!(wait_for_active(&registry, "triage", "v3", PICKUP).await);
    gens.mark_unchanged();
    assert_eq!(registry.view().models[0].history[0], "v2");
    let _ = stop.send(());
}

#[tokio::test]
async fn the_watcher_follows_a_kubernetes_configmap_symlink_swap() {
    use std::os::unix::fs::symlink;
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let first = d.join("..2026_12_02_01_00_00.1");
    std::fs::create_dir(&first).unwrap();
    std::fs::write(
        first.join("triage.json"),
        versioned_map("triage", "v1", 3, 2.0).to_json(),
    )
    .unwrap();
    symlink(first.file_name().unwrap(), d.join("..data")).unwrap();
    symlink("..data/triage.json", d.join("triage.json")).unwrap();
    let (registry, stop) = watched(d);
    assert!(wait_for_active(&registry, "triage", "v1", PICKUP).await);

    // The kubelet's update: a new timestamped folder, a temporary link renamed over ..data,
    // then the old folder removed.
    let second = d.join("..2026_12_02_01_05_00.2");
    std::fs::create_dir(&second).unwrap();
    std::fs::write(
        second.join("triage.json"),
        versioned_map("triage", "v2", 3, 1.5).to_json(),
    )
    .unwrap();
    let t = Instant::now();
    symlink(second.file_name().unwrap(), d.join("..data_tmp")).unwrap();
    std::fs::rename(d.join("..data_tmp"), d.join("..data")).unwrap();
    std::fs::remove_dir_all(&first).unwrap();
    assert!(
        wait_for_active(&registry, "triage", "v2", PICKUP).await,
        "symlink swap not picked up within {PICKUP:?}"
    );
    eprintln!("symlink swap picked up in {:?}", t.elapsed());
    let _ = stop.send(());
}

#[tokio::test]
async fn canary_shadow_and_pinning_route_requests_and_name_the_version() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    for (v, t) in [("v1", 2.0), ("v2", 0.5)] {
        write_atomically(
            &d.join(format!("triage/{v}.json")),
            versioned_map("triage", v, 3, t).to_json().as_bytes(),
        );
    }
    write_atomically(&d.join("triage").join(POINTER_FILE), b"v1");
    let registry = Registry::with_store(d);
    registry.rescan();
    let sidecar = Sidecar::serving(registry.clone()).await;
    let admin = AdminPlane::start(registry.clone(), None).await;
    let mut control = admin.client().await;
    let mut client = sidecar.client().await;

    // Pinning.
    let r = client
        .calibrate(req("triage", "a", "v2"))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        (r.map_version.as_str(), r.route),
        ("v2", Route::Pinned as i32)
    );
    let e = client
        .calibrate(req("triage", "a", "v9"))
        .await
        .unwrap_err();
    assert_eq!(e.code(), Code::NotFound, "{e:?}");
    assert!(
        e.message().contains("\"v9\"") && e.message().contains("v1, v2"),
        "{e:?}"
    );

    // Canary: the same id always meets the same version; roughly the share asked for.
    control
        .set_canary(SetCanaryRequest {
            model: "triage".into(),
            map_version: "v2".into(),
            fraction: 0.3,
        })
        .await
        .unwrap();
    let mut canary = 0;
    for i in 0..300 {
        let id = format!("ticket-{i}");
        let a = client
            .calibrate(req("triage", &id, ""))
            .await
            .unwrap()
            .into_inner();
        let b = client
            .calibrate(req("triage", &id, ""))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(
            a.map_version, b.map_version,
            "a retried id meets the same map"
        );
        if a.route == Route::Canary as i32 {
            assert_eq!(a.map_version, "v2");
            canary += 1;
        } else {
            assert_eq!(
                (a.map_version.as_str(), a.route),
                ("v1", Route::Active as i32)
            );
        }
    }
    // Binomial(300, 0.3): mean 90, sd 7.9 (closed form); allow 5 sd.
    assert!((50..=130).contains(&canary), "{canary}");

    // Shadow: computed for every active-routed request, never returned.
    control
        .set_canary(SetCanaryRequest {
            model: "triage".into(),
            map_version: String::new(),
            fraction: 0.0,
        })
        .await
        .unwrap();
    control
        .set_shadow(SetShadowRequest {
            model: "triage".into(),
            map_version: "v2".into(),
        })
        .await
        .unwrap();
    for i in 0..50 {
        let r = client
            .calibrate(req("triage", &format!("s-{i}"), ""))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(r.map_version, "v1");
    }
    let list = control
        .list_models(ListModelsRequest {})
        .await
        .unwrap()
        .into_inner();
    let m = &list.models[0];
    let shadow = m.shadow.as_ref().unwrap();
    assert_eq!(shadow.compared, 50);
    // T = 2 vs T = 0.5 on logits (2, 0.5, 0): top-label confidence 0.5434 vs 0.9362
    // (max of scipy.special.softmax([1, .25, 0]) and of softmax([4, 1, 0]), scipy 1.17.1);
    // threshold 0.6, so every request flips defer -> accept and the change is 0.3928.
    assert_eq!((shadow.defer_to_accept, shadow.accept_to_defer), (50, 0));
    assert!(
        (shadow.mean_abs_confidence_change - 0.3928).abs() < 1e-3,
        "{shadow:?}"
    );
    let states: Vec<(String, i32)> = m
        .versions
        .iter()
        .map(|v| (v.map_version.clone(), v.state))
        .collect();
    assert_eq!(
        states,
        [
            ("v1".into(), VersionState::Active as i32),
            ("v2".into(), VersionState::Shadow as i32)
        ]
    );
    admin.stop().await;
    sidecar.stop().await;
}

#[tokio::test]
async fn the_admin_plane_requires_its_token_and_refuses_bad_maps_with_the_documented_codes() {
    let dir = tempfile::tempdir().unwrap();
    write_atomically(
        &dir.path().join("triage/v1.json"),
        versioned_map("triage", "v1", 3, 2.0).to_json().as_bytes(),
    );
    let registry = Registry::with_store(dir.path());
    registry.rescan();
    let admin = AdminPlane::start(registry.clone(), Some("tok-123")).await;
    let mut control = admin.client().await;
    let e = control.list_models(ListModelsRequest {}).await.unwrap_err();
    assert_eq!(e.code(), Code::Unauthenticated);
    let mut wrong = tonic::Request::new(ListModelsRequest {});
    wrong
        .metadata_mut()
        .insert("authorization", "Bearer tok-124".parse().unwrap());
    assert_eq!(
        control.list_models(wrong).await.unwrap_err().code(),
        Code::Unauthenticated
    );
    assert_eq!(
        control
            .list_models(with(ListModelsRequest {}))
            .await
            .unwrap()
            .into_inner()
            .models
            .len(),
        1
    );

    let push = |bytes: Vec<u8>| {
        with(PushMapRequest {
            map_json: bytes,
            activate: true,
        })
    };
    let bad = control
        .push_map(push(b"{\"format_version\": 1}".to_vec()))
        .await
        .unwrap_err();
    assert_eq!(bad.code(), Code::InvalidArgument, "{bad:?}");
    let four = versioned_map("triage", "v2", 4, 1.0).to_json().into_bytes();
    let e = control.push_map(push(four)).await.unwrap_err();
    assert_eq!(e.code(), Code::FailedPrecondition, "{e:?}");
    let other_v1 = versioned_map("triage", "v1", 3, 1.0).to_json().into_bytes();
    let e = control.push_map(push(other_v1)).await.unwrap_err();
    assert_eq!(e.code(), Code::AlreadyExists, "{e:?}");
    let e = control
        .activate(with(ActivateRequest {
            model: "triage".into(),
            map_version: "v7".into(),
        }))
        .await
        .unwrap_err();
    assert_eq!(e.code(), Code::NotFound, "{e:?}");
    let ok = versioned_map("triage", "v2", 3, 1.0).to_json().into_bytes();
    let r = control.push_map(push(ok)).await.unwrap().into_inner();
    assert!(r.written);
    assert_eq!(r.status.unwrap().active_version, "v2");
    assert!(dir.path().join("triage/v2.json").is_file());
    admin.stop().await;
}

/// A `candor serve` process started by a test.
pub struct Served {
    pub child: std::process::Child,
    /// Data-plane address.
    pub data: String,
    /// Admin-plane address.
    pub admin: String,
    /// Every log line, returned when the process has exited.
    pub logs: std::thread::JoinHandle<Vec<String>>,
}

/// The address a JSON log line with `message` reports, among `lines`.
pub fn logged_addr(lines: &[String], message: &str) -> Option<String> {
    lines.iter().find_map(|l| {
        let v: serde_json::Value = serde_json::from_str(l).ok()?;
        (v["fields"]["message"] == message)
            .then(|| v["fields"]["addr"].as_str().map(str::to_owned))?
    })
}

/// Starts `candor serve` on ephemeral ports with `extra` arguments; returns once the data and
/// admin listeners are bound (lines logged before that are in `early`).
pub fn spawn_serve_logged(maps: &Path, extra: &[&str]) -> (Served, Vec<String>) {
    spawn(maps, extra)
}

/// [`spawn_serve_logged`] without the early lines.
pub fn spawn_serve(maps: &Path, extra: &[&str]) -> Served {
    spawn(maps, extra).0
}

fn spawn(maps: &Path, extra: &[&str]) -> (Served, Vec<String>) {
    spawn_with(candor(), maps, extra)
}

/// Starts `cmd` (the binary, or a wrapper that execs it with the arguments it is given) as
/// `candor serve` on ephemeral ports.
pub fn spawn_with(
    mut cmd: std::process::Command,
    maps: &Path,
    extra: &[&str],
) -> (Served, Vec<String>) {
    let mut child = cmd
        .args([
            "serve",
            "--listen",
            "127.0.0.1:0",
            "--admin-listen",
            "127.0.0.1:0",
        ])
        .args(["--log-format", "json", "--maps"])
        .arg(maps)
        .args(extra)
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stderr.take().unwrap()).lines();
    let mut early = Vec::new();
    while logged_addr(&early, "listening").is_none()
        || logged_addr(&early, "admin listening").is_none()
    {
        let line = lines
            .next()
            .expect("serve exited before listening")
            .unwrap();
        early.push(line);
    }
    let mut seen = early.clone();
    let logs = std::thread::spawn(move || {
        seen.extend(lines.map_while(Result::ok));
        seen
    });
    let served = Served {
        child,
        data: logged_addr(&early, "listening").unwrap(),
        admin: logged_addr(&early, "admin listening").unwrap(),
        logs,
    };
    (served, early)
}

fn maps_cmd(admin: &str, token_file: &Path, args: &[&str]) -> std::process::Output {
    candor()
        .args(["maps", "--admin", admin, "--admin-token-file"])
        .arg(token_file)
        .args(args)
        .env_remove("CANDOR_ADMIN_TOKEN")
        .output()
        .unwrap()
}

#[test]
fn candor_maps_pushes_activates_and_rolls_back_against_a_running_sidecar() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    write_atomically(
        &store.join("triage/v1.json"),
        versioned_map("triage", "v1", 3, 2.0).to_json().as_bytes(),
    );
    let token = dir.path().join("token");
    std::fs::write(&token, "s3cret-admin\n").unwrap();
    let v2 = dir.path().join("v2.json");
    std::fs::write(&v2, versioned_map("triage", "v2", 3, 1.5).to_json()).unwrap();
    let Served {
        mut child,
        admin,
        logs: rest,
        ..
    } = spawn_serve(&store, &["--admin-token-file", token.to_str().unwrap()]);

    let out = maps_cmd(&admin, &token, &["push", v2.to_str().unwrap()]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(text.contains("stored triage v2"), "{text}");
    assert!(text.contains("triage: active v1"), "{text}");

    let out = maps_cmd(&admin, &token, &["activate", "triage", "v2"]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("triage: active v2 (before: v1)"), "{text}");

    let out = maps_cmd(&admin, &token, &["list", "--json"]);
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["models"][0]["active_version"], "v2");
    assert_eq!(v["models"][0]["versions"][0]["state"], "staged");

    let out = maps_cmd(&admin, &token, &["rollback", "triage"]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("triage: active v1"), "{text}");
    let pointer = std::fs::read_to_string(store.join("triage").join(POINTER_FILE)).unwrap();
    assert_eq!(pointer.trim(), "v1", "the rollback is persisted");

    let out = maps_cmd(
        &admin,
        &token,
        &["canary", "triage", "v2", "--fraction", "0.1"],
    );
    assert!(String::from_utf8_lossy(&out.stdout).contains("canary v2 takes 10.0%"));
    let out = maps_cmd(&admin, &token, &["shadow", "triage", "--clear"]);
    assert!(out.status.success());

    let wrong = dir.path().join("wrong");
    std::fs::write(&wrong, "nope").unwrap();
    let out = maps_cmd(&admin, &wrong, &["list"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("Unauthenticated"));

    let status = std::process::Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    assert_eq!(child.wait().unwrap().code(), Some(0));
    drop(rest.join());
}

#[test]
fn the_admin_listener_refuses_a_public_address_without_a_token() {
    let dir = tempfile::tempdir().unwrap();
    let out = candor()
        .args([
            "serve",
            "--listen",
            "127.0.0.1:0",
            "--admin-listen",
            "0.0.0.0:0",
            "--maps",
        ])
        .arg(dir.path())
        .env_remove("CANDOR_ADMIN_TOKEN")
        .env_remove("CANDOR_ADMIN_TOKEN_FILE")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("not a loopback address and no admin token"),
        "{err}"
    );
}
