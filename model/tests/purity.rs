//! Invariant: the model crate stays pure — no file, network, process, clock-dependent or
//! database access in its sources, and no such dependency in its manifest.

#[test]
fn model_sources_do_no_io() {
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
    assert!(checked >= 10);
    let manifest = std::fs::read_to_string(format!("{root}/Cargo.toml")).unwrap();
    let deps = manifest
        .split("[dependencies]")
        .nth(1)
        .unwrap()
        .split("[dev-dependencies]")
        .next()
        .unwrap();
    // Charts are drawn by the service and by the SBC test, never by the library.
    for word in ["tokio", "sqlx", "reqwest", "arrow", "plotters"] {
        assert!(!deps.contains(word), "model depends on {word}");
    }
}
