#!/usr/bin/env bash
# Debian packages the test suite drives for real: headless Chromium (review page
# browser test), Prometheus and promtool (alert rules, live scrape), wrk (load
# generator for the benchmark), ab from apache2-utils (HTTP/1.0 keep-alive in the reliability
# suite). Installs only what is missing; needs root or sudo.
set -euo pipefail
need=()
command -v chromium >/dev/null 2>&1 || need+=(chromium)
command -v promtool >/dev/null 2>&1 || need+=(prometheus)
command -v wrk >/dev/null 2>&1 || need+=(wrk)
command -v ab >/dev/null 2>&1 || need+=(apache2-utils)
[ ${#need[@]} -eq 0 ] && exit 0
SUDO=""
[ "$(id -u)" -eq 0 ] || SUDO="sudo"
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends "${need[@]}"
# The Debian prometheus package may start a system service on :9090; our tests
# start their own on a free loopback port, so stop it where it started.
$SUDO systemctl stop prometheus >/dev/null 2>&1 || pkill -x prometheus >/dev/null 2>&1 || true
