//! Walking real folder trees: what a root may be, and what the walk passes
//! over or reports (symbolic links, loops, special files).

use std::collections::BTreeMap;
use std::os::unix::fs::symlink;
use std::path::Path;
use std::process::Command;

use vitrine_engine::walk::{resolve_root, walk_root, WalkOptions};
use vitrine_engine::EngineError;

fn make_fifo(path: &Path) {
    let status = Command::new("mkfifo").arg(path).status().unwrap();
    assert!(status.success(), "mkfifo {}", path.display());
}

/// `a/img.png`, `a/alias.png -> img.png`, `loop -> .` (back to the root),
/// `a/b/up -> ..` (back to `a`) and the FIFO `a/pipe`.
fn tree_with_links_and_a_fifo(root: &Path) {
    std::fs::create_dir_all(root.join("a/b")).unwrap();
    std::fs::write(root.join("a/img.png"), b"not decoded by the walk").unwrap();
    symlink("img.png", root.join("a/alias.png")).unwrap();
    symlink(".", root.join("loop")).unwrap();
    symlink("..", root.join("a/b/up")).unwrap();
    make_fifo(&root.join("a/pipe"));
}

#[test]
fn a_root_that_is_not_a_folder_is_refused_naming_what_it_is() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("photo.png");
    std::fs::write(&file, b"bytes").unwrap();
    let refused = resolve_root(&file).unwrap_err();
    assert!(
        matches!(refused, EngineError::RootNotAFolder { kind: "a file", .. }),
        "{refused:?}"
    );
    assert_eq!(
        refused.to_string(),
        format!(
            "{} is a file; give the folder that holds it",
            file.display()
        )
    );
    // Walking it directly is refused too, rather than listing it with an empty path.
    let walked = walk_root(&file, &WalkOptions::default());
    assert!(
        matches!(walked, Err(EngineError::RootNotAFolder { .. })),
        "{walked:?}"
    );

    let fifo = dir.path().join("pipe");
    make_fifo(&fifo);
    let refused = resolve_root(&fifo).unwrap_err();
    assert!(refused.to_string().contains("pipe is a FIFO"), "{refused}");
}

#[test]
fn a_missing_root_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let missing = dir.path().join("nosuchdir");
    let refused = resolve_root(&missing).unwrap_err();
    assert!(
        matches!(refused, EngineError::RootNotFound { .. }),
        "{refused:?}"
    );
    assert_eq!(
        refused.to_string(),
        format!("root {} does not exist", missing.display())
    );
}

#[test]
fn unfollowed_links_and_special_files_are_counted_and_not_listed() {
    let dir = tempfile::tempdir().unwrap();
    tree_with_links_and_a_fifo(dir.path());
    let root = resolve_root(dir.path()).unwrap();
    let walked = walk_root(&root, &WalkOptions::default()).unwrap();
    let listed: Vec<&str> = walked.files.iter().map(|f| f.rel_path.as_str()).collect();
    assert_eq!(listed, ["a/img.png"]);
    assert_eq!(walked.skipped_symlinks, 3);
    assert_eq!(walked.skipped_special_files, 1);
    assert!(walked.problems.is_empty(), "{:?}", walked.problems);
}

#[test]
fn symbolic_link_loops_name_the_folder_they_lead_back_to() {
    let dir = tempfile::tempdir().unwrap();
    tree_with_links_and_a_fifo(dir.path());
    let root = resolve_root(dir.path()).unwrap();
    let options = WalkOptions {
        follow_symlinks: true,
        ..WalkOptions::default()
    };
    let walked = walk_root(&root, &options).unwrap();
    let listed: Vec<&str> = walked.files.iter().map(|f| f.rel_path.as_str()).collect();
    assert_eq!(listed, ["a/alias.png", "a/img.png"]);
    let problems: BTreeMap<&str, &str> = walked
        .problems
        .iter()
        .map(|p| (p.rel_path.as_str(), p.reason.as_str()))
        .collect();
    assert_eq!(
        problems,
        BTreeMap::from([
            ("a/b/up", "symbolic link loop back to a"),
            ("loop", "symbolic link loop back to the root folder"),
        ])
    );
    // A followed link to a FIFO is still a FIFO: counted, never opened.
    assert_eq!(walked.skipped_special_files, 1);
    assert_eq!(walked.skipped_symlinks, 0);
}
