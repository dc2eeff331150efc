//! The files in deploy/ against the binary, so they cannot rot silently: every `candor` argument
//! list is parsed by candor's own command line (a renamed or removed flag fails here), and the
//! ports, paths and names around it must agree with the flags it passes.

use crate::support::{candor, repo};
use clap::CommandFactory as _;
use std::collections::BTreeMap;
use std::path::Path;
use yaml_rust2::{Yaml, YamlEmitter, YamlLoader};

/// The address the data-plane health service is probed under (src/server.rs).
const DATA_SERVICE: &str = candor::server::SERVICE_NAME;

/// `candor serve` as the binary defines it.
fn serve_command() -> clap::Command {
    candor::cli::Cli::command()
        .find_subcommand("serve")
        .cloned()
        .expect("candor has a serve subcommand")
}

/// Parses `args` (program name excluded) with candor's own parser and returns the serve flags as
/// written, by long name; a flag without a value maps to "true".
fn serve_flags(args: &[String]) -> BTreeMap<String, String> {
    let argv = std::iter::once("candor".to_owned()).chain(args.iter().cloned());
    if let Err(e) = candor::cli::Cli::command().try_get_matches_from(argv) {
        panic!("candor's parser refuses {args:?}:\n{e}");
    }
    assert_eq!(args.first().map(String::as_str), Some("serve"), "{args:?}");
    let serve = serve_command();
    let mut out = BTreeMap::new();
    let mut rest = args[1..].iter();
    while let Some(a) = rest.next() {
        let flag = a
            .strip_prefix("--")
            .unwrap_or_else(|| panic!("{a:?} is not a flag"));
        let (name, value) = match flag.split_once('=') {
            Some((n, v)) => (n.to_owned(), v.to_owned()),
            None => {
                let arg = serve.get_arguments().find(|x| x.get_long() == Some(flag));
                let takes = arg.is_some_and(|x| x.get_action().takes_values());
                let v = if takes { rest.next().cloned() } else { None };
                (flag.to_owned(), v.unwrap_or_else(|| "true".to_owned()))
            }
        };
        out.insert(name, value);
    }
    out
}

/// Every serve flag's environment variable: name → (long flag, whether it takes a value).
fn serve_env() -> BTreeMap<String, (String, bool)> {
    serve_command()
        .get_arguments()
        .filter_map(|a| {
            let env = a.get_env()?.to_str()?.to_owned();
            let long = a.get_long()?.to_owned();
            Some((env, (long, a.get_action().takes_values())))
        })
        .collect()
}

/// The port of `host:port`.
fn port_of(addr: &str) -> i64 {
    let (_, p) = addr
        .rsplit_once(':')
        .unwrap_or_else(|| panic!("{addr:?} has no port"));
    p.parse()
        .unwrap_or_else(|e| panic!("port of {addr:?}: {e}"))
}

fn read(path: &str) -> String {
    std::fs::read_to_string(repo(path)).unwrap_or_else(|e| panic!("{path}: {e}"))
}

fn yaml_files(dir: &Path, out: &mut Vec<std::path::PathBuf>) {
    for entry in std::fs::read_dir(dir).unwrap() {
        let p = entry.unwrap().path();
        if p.is_dir() {
            yaml_files(&p, out);
        } else if p.extension().is_some_and(|e| e == "yaml" || e == "yml") {
            out.push(p);
        }
    }
}

/// Every document of every manifest under deploy/kubernetes, with its file.
fn manifests() -> Vec<(String, Yaml)> {
    let mut files = Vec::new();
    yaml_files(&repo("deploy/kubernetes"), &mut files);
    files.sort();
    let mut out = Vec::new();
    for f in files {
        let text = std::fs::read_to_string(&f).unwrap();
        let docs = YamlLoader::load_from_str(&text)
            .unwrap_or_else(|e| panic!("{} is not valid YAML: {e}", f.display()));
        for d in docs {
            out.push((f.display().to_string(), d));
        }
    }
    out
}

fn of_kind<'a>(docs: &'a [(String, Yaml)], kind: &str) -> Vec<&'a Yaml> {
    docs.iter()
        .filter(|(_, d)| d["kind"].as_str() == Some(kind))
        .map(|(_, d)| d)
        .collect()
}

fn named<'a>(docs: &'a [(String, Yaml)], kind: &str, name: &str) -> &'a Yaml {
    of_kind(docs, kind)
        .into_iter()
        .find(|d| d["metadata"]["name"].as_str() == Some(name))
        .unwrap_or_else(|| panic!("no {kind} named {name:?} in deploy/kubernetes"))
}

fn list(y: &Yaml) -> &[Yaml] {
    y.as_vec().map_or(&[], Vec::as_slice)
}

fn strings(y: &Yaml) -> Vec<String> {
    list(y)
        .iter()
        .map(|s| s.as_str().unwrap().to_owned())
        .collect()
}

/// The restrictive container settings every container must carry (pod-level seccomp counts).
fn assert_locked_down(c: &Yaml, pod: &Yaml) {
    let name = c["name"].as_str().unwrap();
    let sc = &c["securityContext"];
    assert_eq!(
        sc["allowPrivilegeEscalation"].as_bool(),
        Some(false),
        "{name}"
    );
    assert_eq!(sc["readOnlyRootFilesystem"].as_bool(), Some(true), "{name}");
    let non_root = sc["runAsNonRoot"]
        .as_bool()
        .or(pod["securityContext"]["runAsNonRoot"].as_bool());
    assert_eq!(non_root, Some(true), "{name}");
    assert_eq!(strings(&sc["capabilities"]["drop"]), ["ALL"], "{name}");
    let seccomp = sc["seccompProfile"]["type"]
        .as_str()
        .or(pod["securityContext"]["seccompProfile"]["type"].as_str());
    assert_eq!(seccomp, Some("RuntimeDefault"), "{name}");
    for kind in ["requests", "limits"] {
        for res in ["cpu", "memory"] {
            assert!(
                !c["resources"][kind][res].is_badvalue(),
                "{name} has no resources.{kind}.{res}"
            );
        }
    }
}

/// The container port named `name`, or the number itself.
fn container_port(containers: &[&Yaml], target: &Yaml) -> i64 {
    if let Some(n) = target.as_i64() {
        return n;
    }
    let name = target.as_str().unwrap();
    containers
        .iter()
        .flat_map(|c| list(&c["ports"]))
        .find(|p| p["name"].as_str() == Some(name))
        .and_then(|p| p["containerPort"].as_i64())
        .unwrap_or_else(|| panic!("no container port named {name:?}"))
}

/// Checks one Deployment's pod: the candor sidecar's flags against its ports, probes, scrape
/// annotations, mounts, the ConfigMap and Secret it mounts, and the Service in front of it.
fn check_deployment(docs: &[(String, Yaml)], dep: &Yaml) {
    let pod = &dep["spec"]["template"];
    let spec = &pod["spec"];
    let sidecar = list(&spec["initContainers"])
        .iter()
        .find(|c| c["name"].as_str() == Some("candor"))
        .expect("candor runs as an init container");
    assert_eq!(
        sidecar["restartPolicy"].as_str(),
        Some("Always"),
        "native sidecar"
    );
    assert!(
        sidecar["command"].is_badvalue(),
        "the image's ENTRYPOINT is the binary"
    );
    let flags = serve_flags(&strings(&sidecar["args"]));
    for env in list(&sidecar["env"]) {
        let n = env["name"].as_str().unwrap();
        assert!(
            !n.starts_with("CANDOR_") || serve_env().contains_key(n),
            "{n}"
        );
    }

    // Ports: the listen flags, the declared container ports, the probes, the scrape annotations.
    let data = port_of(&flags["listen"]);
    let telemetry = port_of(&flags["telemetry-listen"]);
    let ports: Vec<i64> = list(&sidecar["ports"])
        .iter()
        .map(|p| p["containerPort"].as_i64().unwrap())
        .collect();
    assert_eq!(ports, [data, telemetry]);
    for probe in ["startupProbe", "readinessProbe", "livenessProbe"] {
        let grpc = &sidecar[probe]["grpc"];
        assert_eq!(grpc["port"].as_i64(), Some(data), "{probe} port");
        let service = grpc["service"].as_str().unwrap_or("");
        assert!(
            service.is_empty() || service == DATA_SERVICE,
            "{probe}: the server reports \"\" and {DATA_SERVICE:?}, not {service:?}"
        );
    }
    let notes = &pod["metadata"]["annotations"];
    assert_eq!(notes["prometheus.io/scrape"].as_str(), Some("true"));
    assert_eq!(
        notes["prometheus.io/port"].as_str(),
        Some(telemetry.to_string().as_str())
    );
    assert_eq!(notes["prometheus.io/path"].as_str(), Some("/metrics"));
    // kubectl port-forward reaches the pod's loopback: the admin plane stays off the network.
    assert!(flags["admin-listen"].starts_with("127.0.0.1:"));

    // Shutdown: the pod's grace period covers candor's drain.
    let grace: i64 = flags["grace-period-secs"].parse().unwrap();
    let pod_grace = spec["terminationGracePeriodSeconds"].as_i64().unwrap_or(30);
    assert!(
        pod_grace > grace,
        "pod grace {pod_grace} s ≤ candor's {grace} s"
    );

    // Mounts: the maps folder is a whole ConfigMap volume, the token file a Secret key.
    let volume = |path: &str| {
        let mount = list(&sidecar["volumeMounts"])
            .iter()
            .find(|m| m["mountPath"].as_str() == Some(path))
            .unwrap_or_else(|| panic!("nothing is mounted at {path}"));
        assert_eq!(mount["readOnly"].as_bool(), Some(true), "{path}");
        assert!(
            mount["subPath"].is_badvalue(),
            "a subPath never sees updates"
        );
        let name = mount["name"].as_str().unwrap();
        list(&spec["volumes"])
            .iter()
            .find(|v| v["name"].as_str() == Some(name))
            .unwrap_or_else(|| panic!("no volume {name}"))
    };
    let maps = &volume(&flags["maps"])["configMap"];
    assert!(
        maps["items"].is_badvalue(),
        "every key of the ConfigMap is a map file"
    );
    let config_map = maps["name"].as_str().expect("maps come from a ConfigMap");
    let token = Path::new(&flags["admin-token-file"]);
    let secret = &volume(token.parent().unwrap().to_str().unwrap())["secret"];
    let key = token.file_name().unwrap().to_str().unwrap();
    let secret_name = secret["secretName"].as_str().unwrap();
    let shape = named(docs, "Secret", secret_name);
    assert!(
        !shape["stringData"][key].is_badvalue() || !shape["data"][key].is_badvalue(),
        "Secret {secret_name} has no key {key:?}, the token file's name"
    );

    // Every container is locked down.
    let containers: Vec<&Yaml> = list(&spec["initContainers"])
        .iter()
        .chain(list(&spec["containers"]))
        .collect();
    for c in &containers {
        assert_locked_down(c, spec);
    }

    // The Service selecting this pod forwards to declared ports; its metrics port is telemetry's.
    let labels = &pod["metadata"]["labels"];
    for svc in of_kind(docs, "Service") {
        let selector = svc["spec"]["selector"].as_hash().unwrap();
        if selector
            .iter()
            .all(|(k, v)| labels[k.as_str().unwrap()] == *v)
        {
            for p in list(&svc["spec"]["ports"]) {
                let target = container_port(&containers, &p["targetPort"]);
                if p["name"].as_str() == Some("metrics") {
                    assert_eq!(target, telemetry);
                }
            }
        }
    }
    check_maps_config_map(docs, config_map);
}

/// The maps in a committed ConfigMap pass `candor check`, each under the key
/// `<model>.<map_version>.json`.
fn check_maps_config_map(docs: &[(String, Yaml)], name: &str) {
    let Some(cm) = of_kind(docs, "ConfigMap")
        .into_iter()
        .find(|d| d["metadata"]["name"].as_str() == Some(name))
    else {
        // The canary's ConfigMap is made at canary time from map files (deploy/README.md).
        assert!(name.ends_with("-canary"), "no ConfigMap {name}");
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let data = cm["data"].as_hash().expect("the ConfigMap has data");
    assert!(!data.is_empty());
    let mut files = Vec::new();
    for (k, v) in data {
        let (key, text) = (k.as_str().unwrap(), v.as_str().unwrap());
        let map: serde_json::Value = serde_json::from_str(text).unwrap();
        let want = format!(
            "{}.{}.json",
            map["model"].as_str().unwrap(),
            map["map_version"].as_str().unwrap()
        );
        assert_eq!(key, want);
        let path = dir.path().join(key);
        std::fs::write(&path, text).unwrap();
        files.push(path);
    }
    let out = candor().arg("check").args(&files).output().unwrap();
    assert!(
        out.status.success(),
        "candor check refuses ConfigMap {name}: {}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn kubernetes_manifests_agree_with_the_binary() {
    let docs = manifests();
    let deployments = of_kind(&docs, "Deployment");
    assert_eq!(deployments.len(), 2, "the stable and the canary Deployment");
    for dep in &deployments {
        check_deployment(&docs, dep);
    }
    assert!(!of_kind(&docs, "Service").is_empty());
}

#[test]
fn the_canary_pod_is_the_stable_pod_with_other_maps() {
    let docs = manifests();
    let emit = |y: &Yaml| {
        let mut s = String::new();
        YamlEmitter::new(&mut s).dump(y).unwrap();
        s
    };
    let stable = emit(&named(&docs, "Deployment", "letter-sorter")["spec"]["template"]);
    let canary = emit(&named(&docs, "Deployment", "letter-sorter-canary")["spec"]["template"]);
    assert_ne!(stable, canary);
    let canary = canary
        .replace("name: candor-maps-canary", "name: candor-maps")
        .replace("track: canary", "track: stable");
    assert_eq!(stable, canary);
}

#[test]
fn a_renamed_flag_is_refused() {
    // The check above relies on the parser refusing unknown flags; prove that it does.
    let argv = [
        "candor",
        "serve",
        "--maps=/m",
        "--telemetry-listn=0.0.0.0:9464",
    ];
    assert!(candor::cli::Cli::command()
        .try_get_matches_from(argv)
        .is_err());
    let argv = [
        "candor",
        "serve",
        "--maps=/m",
        "--telemetry-listen=0.0.0.0:9464",
    ];
    assert!(candor::cli::Cli::command()
        .try_get_matches_from(argv)
        .is_ok());
}

mod configmap;
mod hosts;
