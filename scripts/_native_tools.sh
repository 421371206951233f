# Sourced by scripts/test and scripts/first-run: the C compiler and Python headers that
# setup.py needs to compile livematch's per-fix modules with mypyc (Debian packages gcc
# and python3-dev, installed when missing). Sets NATIVE_OK=1 when both are at hand.
native_tools() {
    local py=$1
    has_headers() {
        "$py" -c 'import os, sysconfig, sys
sys.exit(not os.path.exists(os.path.join(sysconfig.get_paths()["include"], "Python.h")))'
    }
    local want=()
    command -v "${CC:-cc}" >/dev/null 2>&1 || command -v gcc >/dev/null 2>&1 || want+=(gcc)
    has_headers || want+=(python3-dev)
    if [ ${#want[@]} -gt 0 ] && command -v apt-get >/dev/null 2>&1; then
        local sudo=""; [ "$(id -u)" -ne 0 ] && sudo="sudo"
        $sudo apt-get update -qq || true
        DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq "${want[@]}" >/dev/null || true
    fi
    NATIVE_OK=0
    if { command -v "${CC:-cc}" >/dev/null 2>&1 || command -v gcc >/dev/null 2>&1; } && has_headers; then
        NATIVE_OK=1
    fi
}
