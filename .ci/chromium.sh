# Sourced by .ci/run: make sure Debian's chromium is there for the headless browser test of
# `eaves report` (tests/test_report.py fails instead of skipping under CI).
ensure_chromium() {
    if command -v chromium >/dev/null 2>&1; then
        return 0
    fi
    echo "ci: no chromium; installing Debian's chromium package" >&2
    apt-get update -q && DEBIAN_FRONTEND=noninteractive apt-get install -y -q chromium >&2
}
