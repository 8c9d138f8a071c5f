//! Invariant: the feed crate stays a parser — its manifest pulls in no database, async
//! runtime or chart library (so the fuzz target builds only the readers), and its sources
//! touch no file, network, process or environment.

fn manifest_section<'a>(manifest: &'a str, name: &str) -> &'a str {
    manifest
        .split(&format!("[{name}]"))
        .nth(1)
        .map_or("", |rest| rest.split("\n[").next().unwrap_or(""))
}

#[test]
fn the_feed_crate_depends_on_no_database_runtime_or_charts() {
    let root = env!("CARGO_MANIFEST_DIR");
    let manifest = std::fs::read_to_string(format!("{root}/Cargo.toml")).unwrap();
    let deps = manifest_section(&manifest, "dependencies");
    assert!(
        deps.contains("csv"),
        "no [dependencies] section found: {manifest}"
    );
    for word in [
        "sqlx",
        "rusqlite",
        "tokio",
        "async",
        "plotters",
        "tidemark-service",
    ] {
        assert!(!deps.contains(word), "tidemark-feed depends on {word}");
    }
    // A dependency could also come in through a target-specific table.
    assert!(
        !manifest.contains("[target."),
        "target-specific dependencies"
    );
}

#[test]
fn feed_sources_do_no_io() {
    let root = env!("CARGO_MANIFEST_DIR");
    let forbidden = [
        "std::fs",
        "std::net",
        "std::process",
        "std::env",
        "tokio",
        "sqlx",
        "println!",
        "eprintln!",
        "File::",
    ];
    let mut checked = 0;
    for entry in std::fs::read_dir(format!("{root}/src")).unwrap() {
        let path = entry.unwrap().path();
        let text = std::fs::read_to_string(&path).unwrap();
        for word in forbidden {
            assert!(!text.contains(word), "{} uses `{word}`", path.display());
        }
        checked += 1;
    }
    assert!(checked >= 5, "only {checked} source files found");
}
