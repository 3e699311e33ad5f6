#!/usr/bin/env bash
# Fuzzes every target for a set time: first replays the past findings of each cargo-fuzz target
# (fuzz/regressions/TARGET/), then runs it on its corpus and seeds, then runs each atheris harness
# of tests/fuzz_harness.py. Any crash, panic, leak, timeout or unexpected exception fails the run;
# the input that caused it is written to fuzz/artifacts/.
#
#   fuzz/run.sh SECONDS [TARGET...]      (targets: counts decode load fit; default all)
#
# Needs cargo-fuzz (`cargo install cargo-fuzz --locked`) and the built .venv (`make build`).
# The toolchain is stable Rust: RUSTC_BOOTSTRAP=1 unlocks the nightly-only flags cargo-fuzz
# passes to rustc (sanitizer coverage, AddressSanitizer). The cargo targets are built with
# AddressSanitizer and debug assertions (cargo-fuzz's defaults) but without comparison tracing:
# it made the counting loops about ten times slower, and no input of either target holds a value
# the fuzzer must guess (see README.md). They get a target directory of their own, so that a
# plain `cargo fuzz run` with other flags does not overwrite them.
set -euo pipefail
cd "$(dirname "$0")/.."
root=$PWD

secs=${1:?usage: fuzz/run.sh SECONDS [TARGET...]}
shift
targets=("$@")
[ ${#targets[@]} -gt 0 ] || targets=(counts decode load fit)

# libFuzzer flags per target. counts: inputs beyond 1 KiB add nothing (rows are tiled);
# decode: the largest seed file is 2.5 KiB.
declare -A flags=(
    [counts]="-max_len=1024 -timeout=20"
    [decode]="-max_len=8192 -timeout=20"
    [load]="-timeout=20"
    [fit]="-timeout=20"
)

export RUSTC_BOOTSTRAP=1
build=(--no-trace-compares --target-dir target/no-trace)
for t in "${targets[@]}"; do
    case $t in
    counts | decode)
        if ! cargo fuzz --version >/dev/null 2>&1; then
            echo "fuzz/run.sh: cargo-fuzz is missing: cargo install cargo-fuzz --locked" >&2
            exit 1
        fi
        cd "$root/fuzz"
        mkdir -p "corpus/$t" "artifacts/$t"
        cargo fuzz build "${build[@]}" "$t"
        shopt -s nullglob
        found=(regressions/$t/*)
        shopt -u nullglob
        if [ ${#found[@]} -gt 0 ]; then
            echo "== $t: replaying ${#found[@]} past findings"
            cargo fuzz run "${build[@]}" "$t" "${found[@]}" -- -artifact_prefix="artifacts/$t/"
        fi
        echo "== $t: fuzzing for $secs s"
        # shellcheck disable=SC2086  # the flags are words
        cargo fuzz run "${build[@]}" "$t" "corpus/$t" "seeds/$t" -- -max_total_time="$secs" ${flags[$t]} \
            -artifact_prefix="artifacts/$t/" -print_final_stats=1
        ;;
    load | fit)
        cd "$root"
        [ -x .venv/bin/python ] || { echo "fuzz/run.sh: run make build first" >&2; exit 1; }
        mkdir -p "fuzz/corpus/atheris-$t" "fuzz/artifacts/atheris-$t"
        shopt -s nullglob
        found=(fuzz/regressions/atheris-$t/*)
        shopt -u nullglob
        if [ ${#found[@]} -gt 0 ]; then
            echo "== atheris $t: replaying ${#found[@]} past findings"
            .venv/bin/python tests/fuzz_harness.py "$t" "${found[@]}"
        fi
        echo "== atheris $t: fuzzing for $secs s"
        # shellcheck disable=SC2086
        .venv/bin/python tests/fuzz_harness.py "$t" "fuzz/corpus/atheris-$t" \
            -max_total_time="$secs" ${flags[$t]} \
            -artifact_prefix="fuzz/artifacts/atheris-$t/" -print_final_stats=1
        ;;
    *)
        echo "fuzz/run.sh: unknown target '$t' (counts decode load fit)" >&2
        exit 2
        ;;
    esac
done
echo "== fuzzing done: ${targets[*]}, $secs s each, no findings"
