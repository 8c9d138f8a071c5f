#!/usr/bin/env bash
# Run every benchmark of the repository and write docs/benchmarks.md: the model engine on
# generated networks (REML, B1, B2, B3 with warm and cold refits), feed ingest, and the
# whole pipeline at B3 size (load, fit, publish, database growth).
#
#   scripts/benchmarks.sh            # everything (about 5 minutes on 2 cores)
#   TIDEMARK_B2_MAX_SITES=16000 scripts/benchmarks.sh   # a shorter B2 sweep
#
# Figures are wall-clock on the machine that runs it; run it on a quiet machine.
set -euo pipefail
cd "$(dirname "$0")/.."
out=docs/benchmarks.md
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT

cargo build --release -q -p tidemark-service --examples
cargo bench -q -p tidemark-model --bench networks --no-run >/dev/null 2>&1

run() { # name, command...
    local name=$1
    shift
    echo "== $name" >&2
    /usr/bin/time -f "peak memory %M KiB" "$@" >"$tmp/$name.txt" 2>"$tmp/$name.err" || {
        cat "$tmp/$name.err" >&2
        exit 1
    }
    grep -h "peak memory" "$tmp/$name.err" >>"$tmp/$name.txt" || true
}

run reml cargo bench -q -p tidemark-model --bench networks -- reml
run b1 cargo bench -q -p tidemark-model --bench networks -- b1
run b3 cargo bench -q -p tidemark-model --bench networks -- b3
run b2 cargo bench -q -p tidemark-model --bench networks -- b2
run ingest ./target/release/examples/bench_ingest
run publish ./target/release/examples/bench_publish

section() { # title, file
    printf '\n## %s\n\n```\n' "$1"
    grep -v '^\s*$' "$tmp/$2.txt" | grep -v -E '^(running|test result|Running|Finished)' || true
    printf '```\n'
}

{
    echo "# Benchmarks"
    echo
    echo "Written by \`scripts/benchmarks.sh\` on $(date -u +%Y-%m-%d) at commit $(git rev-parse --short HEAD)."
    echo "Rerun with \`scripts/benchmarks.sh\` (single benchmarks: \`cargo bench -p tidemark-model --bench networks -- b1\`,"
    echo "\`cargo run --release -p tidemark-service --example bench_ingest\`, \`... --example bench_publish\`)."
    echo
    echo "Machine: $(nproc) cores ($(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2 | sed 's/^ //')),"
    echo "$(free -g | awk '/Mem:/ {print $2}') GiB memory, $(uname -sr). Load average at start: $(cut -d' ' -f1-3 /proc/loadavg)."
    echo
    echo "Networks are generated (\`tidemark_model::simulate\`): residual sd 0.3, site sd 0.6, year sd 0.4,"
    echo "2 covariates, 2 visits per site-year, default sampler (4 chains x 1000 saved draws)."
    section "REML (B1 network)" reml
    section "B1: 200 sites x 20 years x 2 visits, 15% of site-years missing" b1
    section "B3: 20,000 sites x 25 years x 2 visits, 60% observed; warm refit after one more year" b3
    section "B2: sites doubling at 25 years" b2
    section "Ingest: 1M-value CSV (bench_ingest)" ingest
    section "Pipeline at B3 size: load, fit, publish, database growth (bench_publish)" publish
} >"$out"
echo "wrote $out" >&2
