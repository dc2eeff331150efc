//! Rollout rules against real files in a temporary store.

use super::natural_cmp;
use crate::decision::DecisionPolicy;
use crate::mapfile::{CalibrationMap, MapParts};
use crate::method::{InputForm, Method, Temperature};
use crate::registry::{Registry, RolloutError, VersionState, POINTER_FILE};
use std::cmp::Ordering;
use std::path::Path;
use std::sync::Arc;

fn map(model: &str, version: &str, k: usize, t: f64, created: &str) -> CalibrationMap {
    let mut provenance = serde_json::Map::new();
    if !created.is_empty() {
        provenance.insert("created_at".into(), created.into());
    }
    CalibrationMap::from_parts(MapParts {
        model: model.into(),
        map_version: version.into(),
        classes: k,
        class_names: None,
        input: InputForm::Logits,
        method: Method::Temperature(Temperature::try_new(t, "t").unwrap()),
        policy: DecisionPolicy::global(0.6),
        provenance,
    })
    .unwrap()
}

fn put(dir: &Path, rel: &str, m: &CalibrationMap) {
    let p = dir.join(rel);
    std::fs::create_dir_all(p.parent().unwrap()).unwrap();
    std::fs::write(p, m.to_json()).unwrap();
}

/// A store holding `triage/v1.json` (K = 3, T = 2) and a registry that has scanned it.
fn triage_v1_store() -> (tempfile::TempDir, Arc<Registry>) {
    let dir = tempfile::tempdir().unwrap();
    put(
        dir.path(),
        "triage/v1.json",
        &map("triage", "v1", 3, 2.0, ""),
    );
    let r = Registry::with_store(dir.path());
    r.rescan();
    (dir, r)
}

fn active(r: &Registry, model: &str) -> String {
    r.with_snapshot(|s| s.get(model).unwrap().active().map.map_version().to_owned())
}

fn state_of(r: &Registry, model: &str, version: &str) -> VersionState {
    let v = r.view();
    let m = v.models.iter().find(|m| m.model == model).unwrap();
    m.versions
        .iter()
        .find(|x| x.version == version)
        .unwrap()
        .state
}

#[test]
fn natural_order_compares_digit_runs_as_numbers() {
    assert_eq!(natural_cmp("v10", "v9"), Ordering::Greater);
    assert_eq!(natural_cmp("v2", "v10"), Ordering::Less);
    assert_eq!(natural_cmp("2026-12-01.2", "2026-12-01.10"), Ordering::Less);
    assert_eq!(natural_cmp("v007", "v7"), Ordering::Equal);
    assert_eq!(natural_cmp("a", "b"), Ordering::Less);
    assert_eq!(natural_cmp("v1", "v1a"), Ordering::Less);
}

#[test]
fn without_a_pointer_the_newest_version_is_active() {
    let dir = tempfile::tempdir().unwrap();
    put(
        dir.path(),
        "triage/v9.json",
        &map("triage", "v9", 3, 2.0, "2026-11-02T00:00:00Z"),
    );
    put(
        dir.path(),
        "triage/v10.json",
        &map("triage", "v10", 3, 1.5, "2026-11-01T00:00:00Z"),
    );
    let r = Registry::with_store(dir.path());
    r.rescan();
    assert_eq!(active(&r, "triage"), "v9", "later created_at wins");
    assert!(r.is_ready());
    put(
        dir.path(),
        "triage/v11.json",
        &map("triage", "v11", 3, 1.2, ""),
    );
    r.rescan();
    assert_eq!(
        active(&r, "triage"),
        "v9",
        "a map without created_at counts as oldest"
    );

    let dir2 = tempfile::tempdir().unwrap();
    put(
        dir2.path(),
        "triage/v9.json",
        &map("triage", "v9", 3, 2.0, ""),
    );
    put(
        dir2.path(),
        "triage/v10.json",
        &map("triage", "v10", 3, 1.5, ""),
    );
    let r2 = Registry::with_store(dir2.path());
    r2.rescan();
    assert_eq!(active(&r2, "triage"), "v10", "then natural order of names");
}

#[test]
fn the_pointer_file_decides_and_a_bad_pointer_keeps_the_current_version() {
    let dir = tempfile::tempdir().unwrap();
    put(
        dir.path(),
        "triage/v1.json",
        &map("triage", "v1", 3, 2.0, ""),
    );
    put(
        dir.path(),
        "triage/v2.json",
        &map("triage", "v2", 3, 1.5, ""),
    );
    std::fs::write(dir.path().join("triage").join(POINTER_FILE), "v1\n").unwrap();
    let r = Registry::with_store(dir.path());
    r.rescan();
    assert_eq!(active(&r, "triage"), "v1");
    assert_eq!(state_of(&r, "triage", "v2"), VersionState::Staged);

    std::fs::write(dir.path().join("triage").join(POINTER_FILE), "v7\n").unwrap();
    let v = r.rescan();
    assert_eq!(active(&r, "triage"), "v1");
    assert_eq!(v.rejections_total, 1);
    assert!(
        v.rejections[0].reason.contains("\"v7\""),
        "{:?}",
        v.rejections
    );
    // The same bad pointer read again is not counted again.
    assert_eq!(r.rescan().rejections_total, 1);

    std::fs::write(dir.path().join("triage").join(POINTER_FILE), "v2").unwrap();
    r.rescan();
    assert_eq!(active(&r, "triage"), "v2");
    assert_eq!(r.view().models[0].history, ["v1"]);
}

#[test]
fn invalid_changed_and_misshapen_maps_never_replace_the_serving_one() {
    let dir = tempfile::tempdir().unwrap();
    let good = map("triage", "v1", 3, 2.0, "");
    put(dir.path(), "triage/v1.json", &good);
    let r = Registry::with_store(dir.path());
    r.rescan();
    let digest = good.digest().to_owned();

    // A partial write of a new version.
    let v2 = map("triage", "v2", 3, 1.5, "2026-12-01T00:00:00Z").to_json();
    std::fs::write(dir.path().join("triage/v2.json"), &v2[..v2.len() / 2]).unwrap();
    let view = r.rescan();
    assert_eq!(active(&r, "triage"), "v1");
    assert_eq!(view.rejections_total, 1);
    assert_eq!(state_of(&r, "triage", "v2"), VersionState::Rejected);
    assert_eq!(
        r.rescan().rejections_total,
        1,
        "an unchanged bad file counts once"
    );
    // The write completes: now it loads and, being newest, becomes active.
    std::fs::write(dir.path().join("triage/v2.json"), &v2).unwrap();
    r.rescan();
    assert_eq!(active(&r, "triage"), "v2");

    // New content under an existing version name.
    put(
        dir.path(),
        "triage/v1.json",
        &map("triage", "v1", 3, 9.0, ""),
    );
    let view = r.rescan();
    assert!(view.rejections.last().unwrap().reason.contains(&digest));
    let v1 = r.with_snapshot(|s| {
        s.get("triage")
            .unwrap()
            .pick("", "v1")
            .unwrap()
            .0
            .map
            .digest()
            .to_owned()
    });
    assert_eq!(v1, digest, "the loaded content of v1 is unchanged");

    // A version for the wrong number of classes.
    put(
        dir.path(),
        "triage/v3.json",
        &map("triage", "v3", 4, 1.0, "2026-12-02T00:00:00Z"),
    );
    let view = r.rescan();
    assert_eq!(active(&r, "triage"), "v2");
    assert!(
        view.rejections.last().unwrap().reason.contains("for 4"),
        "{:?}",
        view.rejections
    );

    // A file in the wrong place.
    put(
        dir.path(),
        "triage/v4.json",
        &map("triage", "v5", 3, 1.0, ""),
    );
    let view = r.rescan();
    assert!(view
        .rejections
        .last()
        .unwrap()
        .reason
        .contains("name it v5.json"));
    assert_eq!(view.rejections_total, 4);
}

#[test]
fn readiness_waits_for_every_model_and_unattributed_file() {
    let dir = tempfile::tempdir().unwrap();
    put(
        dir.path(),
        "triage/v1.json",
        &map("triage", "v1", 3, 2.0, ""),
    );
    std::fs::write(dir.path().join("broken.json"), "{").unwrap();
    let r = Registry::with_store(dir.path());
    r.rescan();
    assert!(
        !r.is_ready(),
        "a flat file that fails belongs to no served model"
    );
    std::fs::remove_file(dir.path().join("broken.json")).unwrap();
    r.rescan();
    assert!(r.is_ready());
    // Once ready, a later bad file does not take readiness away (the latch holds).
    std::fs::write(dir.path().join("broken.json"), "{").unwrap();
    r.rescan();
    assert!(r.is_ready());
}

#[test]
fn a_kubernetes_style_symlink_swap_is_followed() {
    use std::os::unix::fs::symlink;
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    put(
        d,
        "..2026_12_01_a/triage.json",
        &map("triage", "v1", 3, 2.0, ""),
    );
    symlink("..2026_12_01_a", d.join("..data")).unwrap();
    symlink("..data/triage.json", d.join("triage.json")).unwrap();
    let r = Registry::with_store(d);
    r.rescan();
    assert_eq!(active(&r, "triage"), "v1");
    // What the kubelet does: write a new timestamped folder, point a temporary link at it,
    // rename the link over ..data, remove the old folder.
    put(
        d,
        "..2026_12_01_b/triage.json",
        &map("triage", "v2", 3, 1.5, ""),
    );
    symlink("..2026_12_01_b", d.join("..data_tmp")).unwrap();
    std::fs::rename(d.join("..data_tmp"), d.join("..data")).unwrap();
    std::fs::remove_dir_all(d.join("..2026_12_01_a")).unwrap();
    r.rescan();
    assert_eq!(active(&r, "triage"), "v2");
    // v1's file is gone, but it was active: it stays loaded in memory for a rollback.
    r.rollback("triage").unwrap();
    assert_eq!(active(&r, "triage"), "v1");
}

#[test]
fn push_stages_activate_persists_and_rollback_returns() {
    let (dir, r) = triage_v1_store();
    let v2 = map("triage", "v2", 3, 1.5, "2026-12-01T00:00:00Z");
    let (_, _, digest, written) = r.push(v2.to_json().as_bytes(), false).unwrap();
    assert!(written);
    assert_eq!(digest, v2.digest());
    assert_eq!(active(&r, "triage"), "v1", "a pushed version stays staged");
    assert!(dir.path().join("triage/v2.json").is_file());
    let (.., again) = r.push(v2.to_json().as_bytes(), false).unwrap();
    assert!(!again, "the same content is not written twice");
    let other = map("triage", "v2", 3, 1.1, "");
    assert!(matches!(
        r.push(other.to_json().as_bytes(), false),
        Err(RolloutError::VersionConflict { .. })
    ));
    assert!(matches!(
        r.push(b"{\"model\": 1}", false),
        Err(RolloutError::InvalidMap(_))
    ));
    let four = map("triage", "v4", 4, 1.1, "");
    assert!(matches!(
        r.push(four.to_json().as_bytes(), true),
        Err(RolloutError::ShapeMismatch { .. })
    ));

    r.activate("triage", "v2").unwrap();
    assert_eq!(active(&r, "triage"), "v2");
    let pointer = std::fs::read_to_string(dir.path().join("triage").join(POINTER_FILE)).unwrap();
    assert_eq!(pointer.trim(), "v2");
    // A new registry on the same store (a restart) comes back with v2.
    let again = Registry::with_store(dir.path());
    again.rescan();
    assert_eq!(active(&again, "triage"), "v2");

    r.rollback("triage").unwrap();
    assert_eq!(active(&r, "triage"), "v1");
    assert!(matches!(
        r.rollback("triage"),
        Err(RolloutError::NoHistory { .. })
    ));
    assert!(matches!(
        r.activate("triage", "v9"),
        Err(RolloutError::UnknownVersion { .. })
    ));
    assert!(matches!(
        r.activate("nope", "v1"),
        Err(RolloutError::UnknownModel { .. })
    ));
}

#[test]
fn canary_and_shadow_route_and_count() {
    let dir = tempfile::tempdir().unwrap();
    put(
        dir.path(),
        "triage/v1.json",
        &map("triage", "v1", 3, 2.0, ""),
    );
    std::fs::write(dir.path().join("triage").join(POINTER_FILE), "v1").unwrap();
    put(
        dir.path(),
        "triage/v2.json",
        &map("triage", "v2", 3, 0.5, ""),
    );
    let r = Registry::with_store(dir.path());
    r.rescan();
    assert!(matches!(
        r.set_canary("triage", "v1", 0.5),
        Err(RolloutError::IsActive { .. })
    ));
    assert!(matches!(
        r.set_canary("triage", "v2", 1.5),
        Err(RolloutError::BadFraction { .. })
    ));
    r.set_canary("triage", "v2", 0.25).unwrap();
    assert_eq!(state_of(&r, "triage", "v2"), VersionState::Canary);
    let routed: Vec<String> = (0..400)
        .map(|i| {
            r.with_snapshot(|s| {
                let (m, _) = s
                    .get("triage")
                    .unwrap()
                    .pick(&format!("id-{i}"), "")
                    .unwrap();
                m.map.map_version().to_owned()
            })
        })
        .collect();
    let share = routed.iter().filter(|v| *v == "v2").count() as f64 / 400.0;
    // Standard error sqrt(0.25·0.75/400) ≈ 0.022 (closed form); allow 5.
    assert!((share - 0.25).abs() < 0.11, "{share}");
    // Without a request id nothing goes to the canary.
    let plain = r.with_snapshot(|s| s.get("triage").unwrap().pick("", "").unwrap().1);
    assert_eq!(plain, crate::registry::Route::Active);
    r.set_canary("triage", "", 0.0).unwrap();
    assert_eq!(state_of(&r, "triage", "v2"), VersionState::Staged);

    r.set_shadow("triage", "v2").unwrap();
    assert_eq!(state_of(&r, "triage", "v2"), VersionState::Shadow);
    r.with_snapshot(|s| {
        let (_, stats) = s.get("triage").unwrap().shadow().unwrap();
        stats.record(true, false, 0.1);
    });
    let shadow = r.view().models[0].shadow.clone().unwrap();
    assert_eq!(shadow.0, "v2");
    assert_eq!((shadow.1).0, 1);
    // Activating the shadow's version clears the shadow.
    r.activate("triage", "v2").unwrap();
    assert!(r.view().models[0].shadow.is_none());
}

#[test]
fn a_loaded_map_is_held_once_by_the_file_cache_and_the_served_version() {
    // Parameters are not copied from the store's cache into the served version: both hold the
    // same map (a K = 1000 matrix map is 8 MB; a copy doubled a sidecar's memory).
    let (_dir, r) = triage_v1_store();
    let snapshot = r.snapshot();
    let served = snapshot.get("triage").unwrap().active();
    assert_eq!(
        Arc::strong_count(&served.map),
        2,
        "the cache and the served version"
    );
    r.rescan();
    let again = r.snapshot();
    let still = again.get("triage").unwrap().active();
    assert!(Arc::ptr_eq(&served.map, &still.map));
}

#[test]
fn a_scan_counts_the_files_it_parsed_and_not_those_it_reused() {
    // The registry gives freed parse memory back to the system only after a scan that parsed
    // something; an unchanged store must not count as read.
    let (dir, r) = triage_v1_store();
    assert_eq!(r.lock().files_read(), 1);
    r.rescan();
    assert_eq!(r.lock().files_read(), 1, "an unchanged file is reused");
    put(
        dir.path(),
        "triage/v2.json",
        &map("triage", "v2", 3, 1.5, ""),
    );
    r.rescan();
    assert_eq!(r.lock().files_read(), 2, "only the new file is parsed");
    std::fs::write(dir.path().join("triage/broken.json"), "{").unwrap();
    r.rescan();
    r.rescan();
    assert_eq!(
        r.lock().files_read(),
        3,
        "a refused file is parsed once too"
    );
}
