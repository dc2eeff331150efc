//! `candor report` on the demo data, through the real binary.

use crate::support::{candor, repo};
use std::path::Path;

#[test]
fn report_on_demo_traffic_writes_a_self_contained_page() {
    let dir = tempfile::tempdir().unwrap();
    let out_path = dir.path().join("report.html");
    // A fixed map (not the regenerated demo map) so the numpy counts below stay valid.
    let t = candor::method::Temperature::try_new(2.399341447307492, "t").unwrap();
    let map = crate::support::map(
        "letter-sorter",
        6,
        candor::method::InputForm::Logits,
        candor::method::Method::Temperature(t),
        0.95,
    );
    let map_path = dir.path().join("map.json");
    std::fs::write(&map_path, map.to_json()).unwrap();
    let out = candor()
        .args(["report", "--map"])
        .arg(&map_path)
        .arg("--data")
        .arg(repo("demo-data/traffic.jsonl"))
        .arg("--out")
        .arg(&out_path)
        .args(["--bootstrap", "50", "--seed", "1"])
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(0), "{stderr}");
    let stdout = String::from_utf8(out.stdout).unwrap();
    // numpy 2.4.6 on demo-data/traffic.jsonl: q = softmax(z / 2.399341447307492);
    // (q.max(1) >= 0.95).sum() = 1698, of which 1669 have q.argmax(1) == y.
    assert!(stdout.contains("5000 items"), "{stdout}");
    assert!(
        stdout.contains("1698 accepted and 3302 deferred"),
        "{stdout}"
    );
    let page = std::fs::read_to_string(&out_path).unwrap();
    assert!(page.contains("letter-sorter") && page.contains(map.map_version()));
    assert!(page.contains(map.digest()));
    assert_eq!(page.matches("<svg").count(), 4);
    assert!(page.contains("1,698 (34.0%) would be accepted and 3,302 sent to a person"));
    assert!(page.contains("1,669 of the accepted items are right"));
    // numpy: with softmax(z), (p.max(1) >= 0.95).sum() = 3566, accuracy 0.90605… → 90.6%.
    assert!(page.contains("the same rule would accept 3,566 items, 90.6% of them right"));
    assert!(
        page.contains("Not certified"),
        "this map's threshold is set by hand"
    );
    assert!(page.contains("50 replicates (seed 1"));
    assert!(!page.contains("<script"));
}

#[test]
fn report_errors_exit_2_and_name_the_problem() {
    let dir = tempfile::tempdir().unwrap();
    let out_path = dir.path().join("report.html");
    let run = |map: &Path, data: &Path| {
        candor()
            .args(["report", "--map"])
            .arg(map)
            .arg("--data")
            .arg(data)
            .arg("--out")
            .arg(&out_path)
            .args(["--bootstrap", "0"])
            .output()
            .unwrap()
    };
    let missing = dir.path().join("absent.json");
    let out = run(&missing, &repo("demo-data/traffic.jsonl"));
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("absent.json") && stderr.contains("cannot read"),
        "{stderr}"
    );

    let three = dir.path().join("three.csv");
    std::fs::write(&three, "a,b,c,label\n1,2,3,0\n3,2,1,2\n").unwrap();
    let out = run(&repo("demo-data/maps/letter-sorter.json"), &three);
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("expects 6 for 6 classes"), "{stderr}");
    assert!(!out_path.exists(), "no report is written on error");
}
