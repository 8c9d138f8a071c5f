#!/usr/bin/env bash
# What a B3-size version costs in the database, per table, retained and pruned
# (docs/benchmarks.md, "Storage per version"). Runs the publish benchmark keeping its
# database (three published versions), reads SQLite's dbstat per table and index, then
# prunes to keep_draws = 1 with `tidemark prune`, vacuums and reads them again.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release -q -p tidemark-service --examples --bins
dir=$(TIDEMARK_BENCH_KEEP=1 ./target/release/examples/bench_publish | tee /dev/stderr |
    sed -n 's/^working in //p')
cd "$dir"
sizes() {
    sqlite3 tidemark.db "PRAGMA wal_checkpoint(TRUNCATE);" >/dev/null
    sqlite3 -column -header tidemark.db \
        "SELECT name, ROUND(SUM(pgsize) / 1e6, 2) AS mb FROM dbstat GROUP BY name ORDER BY mb DESC LIMIT 8;"
}
echo "== three versions, all with draws"
sizes
sed -i 's/^\[store\]$/[store]\nkeep_draws = 1/' tidemark.toml
"$OLDPWD/target/release/tidemark" --config tidemark.toml prune
sqlite3 tidemark.db "VACUUM;"
echo "== after prune (keep_draws = 1) and VACUUM"
sizes
rm -rf "$dir"
