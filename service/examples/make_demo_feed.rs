//! Write the demo feed (an invented lake network) into a `demo-feed/` directory:
//!
//!     cargo run -p tidemark-service --example make_demo_feed -- demo-feed
//!
//! Rewrites `seasons/*.csv`, `truth/*.csv` and the generated sections of `README.md`
//! (the README must exist and carry the section markers). Every file is written to a
//! temporary file in the same directory and renamed, so nothing half-written is visible.

use std::io::Write as _;
use std::path::{Path, PathBuf};

use anyhow::Context as _;
use tidemark_service::demo_feed;

fn write_atomically(path: &Path, text: &str) -> anyhow::Result<()> {
    let dir = path.parent().context("a file path has a parent")?;
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let mut tmp = tempfile::NamedTempFile::new_in(dir)
        .with_context(|| format!("cannot create a temporary file in {}", dir.display()))?;
    tmp.write_all(text.as_bytes())
        .and_then(|_| tmp.as_file().sync_all())
        .with_context(|| format!("cannot write {}", path.display()))?;
    tmp.persist(path)
        .with_context(|| format!("cannot replace {}", path.display()))?;
    Ok(())
}

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args_os().skip(1);
    let dir = PathBuf::from(args.next().unwrap_or_else(|| "demo-feed".into()));
    if args.next().is_some() {
        anyhow::bail!("usage: make_demo_feed [DIR]   (default DIR: demo-feed)");
    }
    let readme_path = dir.join("README.md");
    let readme = std::fs::read_to_string(&readme_path)
        .with_context(|| format!("cannot read {}", readme_path.display()))?;
    let feed = demo_feed::generate(demo_feed::SEED);
    // Check the README before touching any file, so a bad README leaves everything as is.
    let readme = demo_feed::splice_readme(&readme, &feed.readme)
        .map_err(|e| anyhow::anyhow!("{}: {e}", readme_path.display()))?;
    for (path, text) in &feed.files {
        write_atomically(&dir.join(path), text)?;
    }
    write_atomically(&readme_path, &readme)?;
    print!("{}", feed.summary);
    println!(
        "wrote {} files and README.md in {}",
        feed.files.len(),
        dir.display()
    );
    Ok(())
}
