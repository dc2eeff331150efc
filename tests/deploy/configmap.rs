//! The rollout and rollback of deploy/README.md on a store laid out as the kubelet mounts a
//! ConfigMap: the committed ConfigMap's map, a newer version added by a swap of `..data`, then
//! removed again; the active version must follow without a restart.

use super::{manifests, named};
use crate::support::wait_for_active;
use candor::decision::DecisionPolicy;
use candor::mapfile::{CalibrationMap, MapParts};
use candor::method::{InputForm, Method, Temperature};
use candor::registry::{spawn_store_watcher, Registry, WatchOptions};
use std::os::unix::fs::symlink;
use std::path::Path;
use std::time::Duration;

/// Bound on one pickup: a file event or, failing that, a few fallback rescans.
const PICKUP: Duration = Duration::from_secs(10);
/// The fallback rescan period while the test runs.
const RESCAN: Duration = Duration::from_secs(1);

/// Projects `files` into `dir` as the kubelet's atomic writer does: a new hidden timestamped
/// folder, a temporary link renamed over `..data`, visible links for new keys, removal of the
/// links for keys that are gone, then removal of the previous folder.
fn project(dir: &Path, generation: u32, files: &[(String, String)]) {
    let folder = format!("..2026_12_02_00_00_0{generation}.{generation}");
    std::fs::create_dir(dir.join(&folder)).unwrap();
    for (key, text) in files {
        std::fs::write(dir.join(&folder).join(key), text).unwrap();
    }
    let previous = std::fs::read_link(dir.join("..data")).ok();
    symlink(&folder, dir.join("..data_tmp")).unwrap();
    std::fs::rename(dir.join("..data_tmp"), dir.join("..data")).unwrap();
    for (key, _) in files {
        if std::fs::symlink_metadata(dir.join(key)).is_err() {
            symlink(format!("..data/{key}"), dir.join(key)).unwrap();
        }
    }
    for entry in std::fs::read_dir(dir).unwrap() {
        let name = entry.unwrap().file_name().into_string().unwrap();
        if !name.starts_with('.') && !files.iter().any(|(k, _)| *k == name) {
            std::fs::remove_file(dir.join(&name)).unwrap();
        }
    }
    if let Some(p) = previous {
        std::fs::remove_dir_all(dir.join(p)).unwrap();
    }
}

#[tokio::test]
async fn a_configmap_rollout_and_rollback_move_the_active_version_without_a_restart() {
    let docs = manifests();
    let data = named(&docs, "ConfigMap", "candor-maps")["data"]
        .as_hash()
        .unwrap();
    let current: Vec<(String, String)> = data
        .iter()
        .map(|(k, v)| {
            (
                k.as_str().unwrap().to_owned(),
                v.as_str().unwrap().to_owned(),
            )
        })
        .collect();
    let current_version = CalibrationMap::from_slice(current[0].1.as_bytes())
        .unwrap()
        .map_version()
        .to_owned();

    // The candidate: same model and shape, a later version and creation time.
    let mut provenance = serde_json::Map::new();
    provenance.insert("created_at".into(), "2026-12-09T00:00:00Z".into());
    let next = CalibrationMap::from_parts(MapParts {
        model: "letter-sorter".into(),
        map_version: "2026-12-09.1".into(),
        classes: 6,
        class_names: None,
        input: InputForm::Logits,
        method: Method::Temperature(Temperature::try_new(2.0, "t").unwrap()),
        policy: DecisionPolicy::global(0.9),
        provenance,
    })
    .unwrap();
    let both = [
        current.clone(),
        vec![("letter-sorter.2026-12-09.1.json".to_owned(), next.to_json())],
    ]
    .concat();

    let dir = tempfile::tempdir().unwrap();
    project(dir.path(), 1, &current);
    let registry = Registry::with_store(dir.path());
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    spawn_store_watcher(
        registry.clone(),
        WatchOptions {
            rescan_interval: RESCAN,
            ..WatchOptions::default()
        },
        async {
            let _ = stopped.await;
        },
    );
    assert!(wait_for_active(&registry, "letter-sorter", &current_version, PICKUP).await);

    // Rollout: the ConfigMap gains the newer version.
    project(dir.path(), 2, &both);
    assert!(
        wait_for_active(&registry, "letter-sorter", "2026-12-09.1", PICKUP).await,
        "the added version did not become active"
    );

    // Rollback: the ConfigMap loses it again.
    project(dir.path(), 3, &current);
    assert!(
        wait_for_active(&registry, "letter-sorter", &current_version, PICKUP).await,
        "removing the new version's key did not bring the previous one back"
    );
    let _ = stop.send(());
}
