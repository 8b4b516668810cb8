//! Decisions recorded through the real binary into a real store, fed back
//! into the duplicate and leak reports, and exported as a clean training
//! list that `index --manifest` reads back: re-indexing from it reports no
//! leaks and no undecided duplicates. The expected training list is computed
//! here from the folders themselves (the split/label folder convention the
//! README documents), not from vitrine's output.

mod common;

use std::collections::BTreeSet;
use std::path::Path;

use common::{start_service, stop, write_image, Fixture};
use serde_json::{json, Value};

// The tiny test model's embeddings say nothing about pictures, so the
// reports here judge by identical bytes and pixels alone.
fn json(fx: &Fixture, args: &[&str]) -> Value {
    let out = fx.run(&[args, &["--format", "json"]].concat());
    assert!(
        out.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

fn ok(fx: &Fixture, args: &[&str]) -> String {
    let out = fx.command(args).env("USER", "curator").output().unwrap();
    assert!(
        out.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

/// `vitrine export --format FORMAT --output FILE`; the file's text.
fn export(fx: &Fixture, format: &str, file: &Path) -> String {
    ok(
        fx,
        &[
            "export",
            "--format",
            format,
            "--output",
            file.to_str().unwrap(),
        ],
    );
    std::fs::read_to_string(file).unwrap()
}

fn refused(fx: &Fixture, args: &[&str]) -> String {
    let out = fx.command(args).env("USER", "curator").output().unwrap();
    assert!(!out.status.success(), "{args:?} was accepted");
    String::from_utf8_lossy(&out.stderr).into_owned()
}

/// Every image file under `images` as `path,split,label` by the folder
/// convention (`split/label/file`), minus `left_out`, with `relabelled` applied.
fn expected_manifest(images: &Path, left_out: &[&str], relabelled: &[(&str, &str)]) -> String {
    let mut rows = BTreeSet::new();
    let mut stack = vec![images.to_path_buf()];
    while let Some(dir) = stack.pop() {
        for entry in std::fs::read_dir(&dir).unwrap() {
            let path = entry.unwrap().path();
            if path.is_dir() {
                stack.push(path);
                continue;
            }
            let rel = path
                .strip_prefix(images)
                .unwrap()
                .to_str()
                .unwrap()
                .to_owned();
            if left_out.contains(&rel.as_str()) {
                continue;
            }
            let parts: Vec<&str> = rel.split('/').collect();
            let (mut split, mut label) = match parts.as_slice() {
                [split, label, _] => (split.to_string(), label.to_string()),
                _ => (String::new(), String::new()),
            };
            if !["train", "val", "test"].contains(&split.as_str()) {
                (split, label) = (String::new(), String::new());
            }
            if let Some((_, given)) = relabelled.iter().find(|(p, _)| *p == rel) {
                label = given.to_string();
            }
            rows.insert(format!("{rel},{split},{label}"));
        }
    }
    let mut text = String::from("path,split,label\n");
    for row in rows {
        text.push_str(&row);
        text.push('\n');
    }
    text
}

/// Labelled images in three splits, an unlabelled one, a byte copy inside
/// train, a byte copy leaked into test, and one picture in two formats.
fn collection_with_copies() -> Fixture {
    let fx = Fixture::new();
    let images = fx.images();
    for (i, place) in [
        "train/cat/0.png",
        "train/cat/1.png",
        "train/dog/2.png",
        "train/dog/3.png",
        "val/cat/4.png",
        "val/dog/5.png",
        "test/cat/6.png",
        "test/dog/7.png",
        "unsorted/8.png",
    ]
    .iter()
    .enumerate()
    {
        write_image(&images.join(place), i as u32);
    }
    // A copy inside train and a copy leaked into test, byte for byte.
    std::fs::copy(
        images.join("train/cat/0.png"),
        images.join("train/dog/copy-of-0.png"),
    )
    .unwrap();
    std::fs::copy(
        images.join("train/cat/0.png"),
        images.join("test/cat/leaked-0.png"),
    )
    .unwrap();
    // The same pixels in another file format: a pixel-tier pair.
    image::open(images.join("train/dog/3.png"))
        .unwrap()
        .save(images.join("train/dog/3.bmp"))
        .unwrap();
    fx.index();
    fx
}

#[test]
fn decisions_settle_reports_and_the_exported_manifest_reindexes_clean() {
    let fx = collection_with_copies();
    let images = fx.images();

    let groups = json(&fx, &["duplicates", "--threshold", "1", "--no-verify"])["groups"]
        .as_array()
        .unwrap()
        .clone();
    assert_eq!(groups.len(), 2, "{groups:?}");
    assert!(groups.iter().all(|g| g["decided"] == false));
    let leaks = json(&fx, &["leaks", "--threshold", "1", "--no-verify"]);
    assert_eq!(leaks["leaks"].as_array().unwrap().len(), 1, "{leaks}");
    assert_eq!(leaks["leaks"][0]["decided"], false);

    // Bad decisions are refused with a reason and record nothing.
    assert!(refused(&fx, &["decide", "drop", "train/cat/nosuch.png"])
        .contains("no indexed image has the path"));
    assert!(
        refused(&fx, &["decide", "split", "val/cat/4.png", "tset"]).contains("test, train, val")
    );
    assert!(refused(
        &fx,
        &[
            "decide",
            "distinct",
            "train/cat/0.png",
            "test/cat/leaked-0.png"
        ]
    )
    .contains("same bytes"));
    assert!(refused(&fx, &["decide", "undo"]).contains("no decision to undo"));
    assert_eq!(json(&fx, &["decide", "list"]), Value::Array(Vec::new()));

    let said = ok(
        &fx,
        &[
            "decide",
            "drop",
            "train/dog/copy-of-0.png",
            "test/cat/leaked-0.png",
        ],
    );
    assert!(
        said.contains("decision 1: drop train/dog/copy-of-0.png"),
        "{said}"
    );
    assert!(
        said.contains("decision 2: drop test/cat/leaked-0.png"),
        "{said}"
    );
    ok(
        &fx,
        &["decide", "distinct", "train/dog/3.png", "train/dog/3.bmp"],
    );
    ok(&fx, &["decide", "label", "unsorted/8.png", "cat"]);
    ok(&fx, &["decide", "split", "val/dog/5.png", "train"]);
    // Taken back: the split stays as the folders say.
    assert!(ok(&fx, &["decide", "undo"]).contains("decision 6: undo 5"));

    let duplicates = json(&fx, &["duplicates", "--threshold", "1", "--no-verify"]);
    let groups = duplicates["groups"].as_array().unwrap();
    assert_eq!(
        groups.len(),
        1,
        "the distinct pair is left out: {duplicates}"
    );
    assert_eq!(duplicates["left_out_as_distinct"], 1);
    assert_eq!(groups[0]["decided"], true);
    let leaks = json(&fx, &["leaks", "--threshold", "1", "--no-verify"]);
    assert_eq!(leaks["leaks"][0]["decided"], true, "{leaks}");

    let counts = &json(&fx, &["status"])["decisions"];
    assert_eq!(counts["in_effect"], 4, "{counts}");
    assert_eq!(
        (
            counts["dropped"].as_u64(),
            counts["distinct_pairs"].as_u64()
        ),
        (Some(2), Some(1))
    );
    assert_eq!(
        (counts["labels_given"].as_u64(), counts["undone"].as_u64()),
        (Some(1), Some(1))
    );
    // Calibration takes the decided pairs as labelled pairs.
    let calibration = json(&fx, &["calibrate", "--sample", "3"]);
    assert_eq!(calibration["decided_copies"], 2, "{calibration}");
    assert_eq!(calibration["decided_not_copies"], 1);
    assert!(calibration["points"][0]["recall_decided"].is_number());
    let log = json(&fx, &["decide", "list"]);
    let log = log.as_array().unwrap();
    assert_eq!(log.len(), 6);
    assert!(log.iter().all(|d| d["by"] == "curator"));
    assert_eq!(log[4]["undone_by"], 6);
    assert_eq!(log[0]["image"]["path"], "train/dog/copy-of-0.png");

    // The exported list, against the folders.
    let manifest = fx.dir.path().join("clean.csv");
    let manifest_text = export(&fx, "manifest", &manifest);
    let expected = expected_manifest(
        &images,
        &["train/dog/copy-of-0.png", "test/cat/leaked-0.png"],
        &[("unsorted/8.png", "cat")],
    );
    assert_eq!(manifest_text, expected);
    let audit = fx.dir.path().join("decisions.jsonl");
    let audit_text = export(&fx, "decisions-jsonl", &audit);
    assert_eq!(audit_text.lines().count(), 6);

    // Re-indexed from the list: the decisions follow their files.
    ok(
        &fx,
        &[
            "index",
            images.to_str().unwrap(),
            "--manifest",
            manifest.to_str().unwrap(),
        ],
    );
    let leaks = json(&fx, &["leaks", "--threshold", "1", "--no-verify"]);
    assert!(leaks["leaks"].as_array().unwrap().is_empty(), "{leaks}");
    let duplicates = json(&fx, &["duplicates", "--threshold", "1", "--no-verify"]);
    let groups = duplicates["groups"].as_array().unwrap();
    assert!(groups.iter().all(|g| g["decided"] == true), "{duplicates}");
    assert_eq!(duplicates["left_out_as_distinct"], 1);

    // A file that changes after a decision: the decision is stale, not applied.
    write_image(&images.join("test/cat/leaked-0.png"), 99);
    ok(
        &fx,
        &[
            "index",
            images.to_str().unwrap(),
            "--manifest",
            manifest.to_str().unwrap(),
        ],
    );
    let log = json(&fx, &["decide", "list"]);
    assert_eq!(log[1]["stale"], true, "{log}");
    assert_eq!(log[0]["stale"], false);
    let manifest_text = export(&fx, "manifest", &manifest);
    assert!(manifest_text.contains("test/cat/leaked-0.png,,"));
}

/// Sends a decision to the service; the status and the JSON answer.
fn post(url: &str, key: Option<&str>, origin: Option<&str>, body: Value) -> (u16, Value) {
    let mut request = ureq::post(url);
    if let Some(key) = key {
        request = request.set("X-Vitrine-Page-Key", key);
    }
    if let Some(origin) = origin {
        request = request.set("Origin", origin);
    }
    match request.send_json(body) {
        Ok(response) => (response.status(), response.into_json().unwrap()),
        Err(ureq::Error::Status(status, response)) => (status, response.into_json().unwrap()),
        Err(err) => panic!("{url}: {err}"),
    }
}

fn get(url: &str) -> Value {
    ureq::get(url).call().unwrap().into_json().unwrap()
}

#[test]
fn decisions_over_http_are_guarded_race_free_and_durable() {
    let fx = collection_with_copies();
    let (service, url) = start_service(&fx);
    let api = format!("{url}/api/v1/collections/store");
    let decide = format!("{api}/decisions");
    let key = get(&format!("{url}/api/v1/page-key"))["key"]
        .as_str()
        .unwrap()
        .to_owned();
    let drop_leak = json!({"action": "drop", "path": "test/cat/leaked-0.png"});

    // Without a token: only with this process's page key, and from a browser
    // only from this server's own origin.
    let (status, body) = post(&decide, None, None, drop_leak.clone());
    assert_eq!(
        (status, body["error"]["code"].as_str()),
        (403, Some("page_key_required"))
    );
    let (status, body) = post(
        &decide,
        Some(&key),
        Some("http://elsewhere.example"),
        drop_leak.clone(),
    );
    assert_eq!(
        (status, body["error"]["code"].as_str()),
        (403, Some("foreign_origin"))
    );
    let (status, body) = post(&decide, Some(&key), Some(&url), drop_leak.clone());
    assert_eq!(status, 201, "{body}");
    assert_eq!(
        (body["number"].as_u64(), body["by"].as_str()),
        (Some(1), Some("page"))
    );

    // Bad requests: a clear 4xx, nothing recorded.
    for (bad, code) in [
        (
            json!({"action": "drop", "path": "nosuch.png"}),
            "unknown_path",
        ),
        (
            json!({"action": "split", "path": "val/cat/4.png", "split": "tset"}),
            "unknown_split",
        ),
        (
            json!({"action": "undo", "decision": 99}),
            "invalid_decision",
        ),
        (
            json!({"action": "shred", "path": "val/cat/4.png"}),
            "invalid_json",
        ),
    ] {
        let (status, body) = post(&decide, Some(&key), None, bad.clone());
        assert!((400..500).contains(&status), "{bad} answered {status}");
        assert_eq!(body["error"]["code"], code, "{bad}: {body}");
    }

    // Reviewers racing on one image: exactly one decision is taken, the others
    // are told what changed. Racing on different images: none is lost.
    let outcomes: Vec<u16> = std::thread::scope(|scope| {
        let workers: Vec<_> = (0..6)
            .map(|i| {
                let (decide, key) = (&decide, &key);
                scope.spawn(move || {
                    let action = if i % 2 == 0 { "drop" } else { "keep" };
                    let body =
                        json!({"action": action, "path": "train/dog/copy-of-0.png", "seen": 0});
                    post(decide, Some(key), None, body).0
                })
            })
            .collect();
        workers.into_iter().map(|w| w.join().unwrap()).collect()
    });
    assert_eq!(
        outcomes.iter().filter(|&&s| s == 201).count(),
        1,
        "{outcomes:?}"
    );
    assert_eq!(
        outcomes.iter().filter(|&&s| s == 409).count(),
        5,
        "{outcomes:?}"
    );
    let paths = [
        "train/cat/1.png",
        "train/dog/2.png",
        "val/cat/4.png",
        "val/dog/5.png",
    ];
    std::thread::scope(|scope| {
        for path in paths {
            let (decide, key) = (&decide, &key);
            scope.spawn(move || {
                let (status, body) = post(
                    decide,
                    Some(key),
                    None,
                    json!({"action": "keep", "path": path, "seen": 0}),
                );
                assert_eq!(status, 201, "{body}");
            });
        }
    });
    let log = get(&decide);
    assert_eq!(log["decisions"].as_array().unwrap().len(), 6, "{log}");
    assert_eq!(
        log["counts"]["kept"].as_u64().unwrap() + log["counts"]["dropped"].as_u64().unwrap(),
        6
    );

    // The reports see the decisions at once.
    let leaks = get(&format!("{api}/leaks?verify=false&threshold=1"));
    assert_eq!(
        (leaks["decided"].as_u64(), leaks["total"].as_u64()),
        (Some(1), Some(1)),
        "{leaks}"
    );
    let open = get(&format!(
        "{api}/leaks?verify=false&threshold=1&undecided=true"
    ));
    assert_eq!(open["total"], 0, "{open}");

    // The command line decides and exports through the running service.
    let said = ok(&fx, &["decide", "drop", "unsorted/8.png"]);
    assert!(said.contains("decision 7: drop unsorted/8.png"), "{said}");
    let log = get(&decide);
    assert_eq!(log["decisions"][6]["by"], "curator", "{log}");
    let served_manifest = ureq::get(&format!("{api}/manifest"))
        .call()
        .unwrap()
        .into_string()
        .unwrap();
    assert!(!served_manifest.contains("unsorted/8.png"));
    let through_service = fx.dir.path().join("through-service.csv");
    let through_service_text = export(&fx, "manifest", &through_service);
    assert_eq!(through_service_text, served_manifest);

    // A kill right after acknowledged decisions loses none of them.
    let mut service = service;
    service.kill().unwrap();
    service.wait().unwrap();
    let listed = json(&fx, &["decide", "list"]);
    assert_eq!(listed.as_array().unwrap().len(), 7);
    let exported = fx.dir.path().join("list.csv");
    let exported_text = export(&fx, "manifest", &exported);
    assert_eq!(exported_text, served_manifest);
    let (service, url) = start_service(&fx);
    let log = get(&format!("{url}/api/v1/collections/store/decisions"));
    assert_eq!(
        log["decisions"], listed,
        "the restarted service reads the same log"
    );
    stop(service);
}
