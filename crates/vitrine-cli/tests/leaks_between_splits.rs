//! Leaks between every pair of splits, through the real binary: the
//! expected pairs are the copies this test makes, byte for byte.

mod common;

use std::collections::BTreeSet;

use common::{write_image, Fixture};
use serde_json::Value;

// The tiny test model's embeddings say nothing about pictures: judge by
// identical bytes alone.
fn leaks(fx: &Fixture, extra: &[&str]) -> Value {
    let args = [
        &[
            "leaks",
            "--threshold",
            "1",
            "--no-verify",
            "--format",
            "json",
        ],
        extra,
    ]
    .concat();
    let out = fx.run(&args);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

fn pairs(report: &Value) -> BTreeSet<(String, String)> {
    report["leaks"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| {
            (
                l["path"].as_str().unwrap().to_owned(),
                l["counterpart"]["path"].as_str().unwrap().to_owned(),
            )
        })
        .collect()
}

fn owned(list: &[(&str, &str)]) -> BTreeSet<(String, String)> {
    list.iter()
        .map(|(a, b)| (a.to_string(), b.to_string()))
        .collect()
}

#[test]
fn every_split_is_checked_against_the_splits_before_it() {
    let fx = Fixture::new();
    let images = fx.images();
    for (i, place) in [
        "train/cat/0.png",
        "val/cat/1.png",
        "test/cat/2.png",
        "test/dog/3.png",
    ]
    .iter()
    .enumerate()
    {
        write_image(&images.join(place), i as u32);
    }
    let copy = |from: &str, to: &str| {
        std::fs::create_dir_all(images.join(to).parent().unwrap()).unwrap();
        std::fs::copy(images.join(from), images.join(to)).unwrap();
    };
    // A test image copied into val only; a train image copied into val and
    // into test (its counterpart is the train original, the earliest split).
    copy("val/cat/1.png", "test/cat/copy-of-1.png");
    copy("train/cat/0.png", "val/dog/copy-of-0.png");
    copy("train/cat/0.png", "test/dog/copy-of-0.png");
    fx.index();

    let all = leaks(&fx, &[]);
    assert_eq!(all["reference_split"], Value::Null);
    assert_eq!(
        pairs(&all),
        owned(&[
            ("test/cat/copy-of-1.png", "val/cat/1.png"),
            ("val/dog/copy-of-0.png", "train/cat/0.png"),
            ("test/dog/copy-of-0.png", "train/cat/0.png"),
        ])
    );
    let between: BTreeSet<(String, String, u64)> = all["between"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| {
            (
                b["split"].as_str().unwrap().to_owned(),
                b["from"].as_str().unwrap().to_owned(),
                b["leaked"].as_u64().unwrap(),
            )
        })
        .collect();
    let expected: BTreeSet<(String, String, u64)> = [
        ("val", "train", 1),
        ("test", "train", 1),
        ("test", "val", 1),
    ]
    .iter()
    .map(|(a, b, n)| (a.to_string(), b.to_string(), *n))
    .collect();
    assert_eq!(between, expected);
    assert_eq!(
        all["per_label"],
        serde_json::json!([{"label": "cat", "leaked": 1}, {"label": "dog", "leaked": 2}])
    );
    let summary: Vec<(&str, u64)> = all["summary"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| (s["split"].as_str().unwrap(), s["leaked"].as_u64().unwrap()))
        .collect();
    assert_eq!(summary, [("val", 1), ("test", 2)]);

    // Against one reference split, as before.
    let against_train = leaks(&fx, &["--against", "train"]);
    assert_eq!(against_train["reference_split"], "train");
    assert_eq!(
        pairs(&against_train),
        owned(&[
            ("val/dog/copy-of-0.png", "train/cat/0.png"),
            ("test/dog/copy-of-0.png", "train/cat/0.png"),
        ])
    );
}
