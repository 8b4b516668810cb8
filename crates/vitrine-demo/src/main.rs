//! `vitrine-demo-gen [OUT_DIR]`: writes the invented Kiln & Knot demo collection.
//!
//! Without an argument it regenerates the committed `demo-images/` of this workspace. The
//! output depends only on the fixed seed, so running it twice gives byte-identical files.

mod canvas;
mod collection;
mod derive;
mod portable;
mod products;
mod scene;

use std::path::PathBuf;

use anyhow::{bail, Result};

fn main() -> Result<()> {
    let mut arguments = std::env::args_os().skip(1);
    let out_dir = match (arguments.next(), arguments.next()) {
        (None, _) => PathBuf::from(concat!(env!("CARGO_MANIFEST_DIR"), "/../../demo-images")),
        (Some(dir), None) => PathBuf::from(dir),
        (Some(_), Some(_)) => bail!("usage: vitrine-demo-gen [OUT_DIR]"),
    };
    let collection = collection::build()?;
    collection::write(&collection, &out_dir)?;
    println!("wrote {}\n{}", out_dir.display(), collection.summary());
    Ok(())
}
