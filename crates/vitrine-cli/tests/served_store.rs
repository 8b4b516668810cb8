//! The command line while a running service holds the store: read commands
//! are answered through the service (found from the record it keeps in the
//! store folder) and print exactly what they print when they open the store
//! themselves; commands that need the store itself say which service holds
//! it. Real binary, real store, a real HTTP server on an ephemeral loopback
//! port.

mod common;

use common::{start_service, stop, write_image, Fixture};
use serde_json::Value;

/// Every read command of the command line, with JSON output.
const READ_COMMANDS: &[&[&str]] = &[
    &["status", "--errors"],
    &["similar", "--path", "a.png", "-k", "4"],
    &["similar", "--path", "a.png", "-k", "4", "--split", "test"],
    &["duplicates"],
    &["leaks"],
    &["leaks", "--against", "val"],
    &["clusters", "-k", "3"],
    &["labels", "suggest", "--min-confidence", "0"],
    &["labels", "suspects"],
    &[
        "labels",
        "suspects",
        "--method",
        "neighbour-vote",
        "-k",
        "3",
    ],
];

fn answer(fx: &Fixture, args: &[&str]) -> (Value, String) {
    let out = fx.run(&[args, &["--format", "json"]].concat());
    let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
    assert!(out.status.success(), "{args:?} failed: {stderr}");
    let json = serde_json::from_slice(&out.stdout)
        .unwrap_or_else(|err| panic!("{args:?} printed no JSON ({err}): {stderr}"));
    (json, stderr)
}

/// A collection with copies inside and across splits, labelled.
fn indexed_collection() -> Fixture {
    let fx = Fixture::new();
    let images = fx.images();
    for (i, (split, label)) in [
        ("train", "cat"),
        ("train", "cat"),
        ("train", "dog"),
        ("train", "dog"),
        ("val", "cat"),
        ("val", "dog"),
        ("test", "cat"),
        ("test", "dog"),
    ]
    .iter()
    .enumerate()
    {
        write_image(
            &images.join(split).join(label).join(format!("{i}.png")),
            i as u32,
        );
    }
    write_image(&images.join("a.png"), 3);
    // Byte-identical copies: one inside train, one leaked into test.
    let original = images.join("train/cat/0.png");
    std::fs::copy(&original, images.join("train/dog/copy-of-0.png")).unwrap();
    std::fs::copy(&original, images.join("test/cat/leaked-0.png")).unwrap();
    fx.index();
    fx
}

#[test]
fn read_commands_answer_through_the_service_exactly_as_from_the_store() {
    let fx = indexed_collection();
    let direct: Vec<Value> = READ_COMMANDS
        .iter()
        .map(|args| answer(&fx, args).0)
        .collect();
    // The collection has what the comparisons are about.
    assert!(
        !direct[3]["groups"].as_array().unwrap().is_empty(),
        "{}",
        direct[3]
    );
    assert!(
        !direct[4]["leaks"].as_array().unwrap().is_empty(),
        "{}",
        direct[4]
    );

    let (service, _) = start_service(&fx);
    let record: Value = serde_json::from_slice(
        &std::fs::read(fx.store().join("served-by.json")).expect("the service recorded itself"),
    )
    .unwrap();
    assert_eq!(record["pid"], service.id());
    for (args, expected) in READ_COMMANDS.iter().zip(&direct) {
        let (served, stderr) = answer(&fx, args);
        assert!(
            stderr.contains("holds this store; asking it"),
            "{args:?}: {stderr}"
        );
        assert_eq!(
            &served, expected,
            "{args:?} answered differently through the service"
        );
    }

    // Mistakes are reported as the service words them, with a failing exit.
    let out = fx.run(&["leaks", "--against", "nosuch"]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(stderr.contains("no image is in split `nosuch`"), "{stderr}");
    assert!(stderr.contains("test, train, val"), "{stderr}");

    // A writer cannot share the store: the message names the service.
    let out = fx.run(&["index", fx.images().to_str().unwrap()]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(stderr.contains(record["url"].as_str().unwrap()), "{stderr}");
    assert!(stderr.contains("stop the service"), "{stderr}");

    stop(service);
    assert!(
        !fx.store().join("served-by.json").exists(),
        "a stopped service leaves no record"
    );
    let (after, stderr) = answer(&fx, &["status", "--errors"]);
    assert!(!stderr.contains("asking it"), "{stderr}");
    assert_eq!(after, direct[0]);
}

#[test]
fn a_record_left_by_a_killed_service_does_not_stand_in_the_way() {
    let fx = indexed_collection();
    let (mut service, _) = start_service(&fx);
    service.kill().unwrap();
    service.wait().unwrap();
    assert!(fx.store().join("served-by.json").exists());
    // The store is free again, so the command opens it and ignores the record.
    let (status, stderr) = answer(&fx, &["status"]);
    assert!(!stderr.contains("asking it"), "{stderr}");
    assert_eq!(status["images"], 11);
    let out = fx.run(&["index", fx.images().to_str().unwrap()]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}
