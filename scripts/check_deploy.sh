#!/usr/bin/env bash
# Check the files in deploy/ with the tools that own their formats, where installed:
#   promtool (Debian package `prometheus`): scrape configs, alert rules and their unit tests;
#   python: the Grafana dashboard is what scripts/grafana_dashboard.py generates;
#   kubectl kustomize (offline): the Kubernetes manifests parse and assemble;
#   systemd-analyze verify: the unit file (with ExecStart pointed at /bin/true).
# Exit status is non-zero if any available check fails; missing tools are reported, and
# promtool is required (pass --allow-missing to skip it as well).
set -euo pipefail
cd "$(dirname "$0")/.."
allow_missing=0
[[ "${1:-}" == "--allow-missing" ]] && allow_missing=1
py=python3
[[ -x .venv/bin/python ]] && py=.venv/bin/python
failed=0
run() {
  echo "+ $*"
  if ! "$@"; then echo "FAILED: $*"; failed=1; fi
}

if command -v promtool >/dev/null 2>&1; then
  run promtool check config deploy/prometheus/prometheus.yml
  run promtool check config deploy/prometheus/prometheus-k8s.yml
  run promtool check rules deploy/prometheus/alerts.yml
  run promtool test rules deploy/prometheus/alerts_test.yml
elif [[ $allow_missing == 1 ]]; then
  echo "skip: promtool not installed (apt-get install prometheus)"
else
  echo "FAILED: promtool not installed (apt-get install prometheus)"; failed=1
fi

run "$py" scripts/grafana_dashboard.py --check
run "$py" -c 'import json,sys; json.load(open("deploy/grafana/streamgroup.json"))'

if command -v kubectl >/dev/null 2>&1; then
  echo "+ kubectl kustomize deploy/k8s"
  if ! out=$(kubectl kustomize deploy/k8s); then echo "FAILED: kubectl kustomize"; failed=1
  else
    for kind in ConfigMap Deployment Service; do
      grep -q "^kind: $kind$" <<<"$out" || { echo "FAILED: no $kind in deploy/k8s"; failed=1; }
    done
  fi
else
  echo "skip: kubectl not installed"
fi

if command -v systemd-analyze >/dev/null 2>&1; then
  tmp=$(mktemp -d)
  trap 'rm -rf "$tmp"' EXIT
  # verify insists that ExecStart exists; the real path only exists on an installed host.
  sed 's|^ExecStart=/opt/streamgroup/venv/bin/streamgroup|ExecStart=/bin/true|' \
    deploy/systemd/streamgroup.service >"$tmp/streamgroup.service"
  echo "+ systemd-analyze verify deploy/systemd/streamgroup.service"
  if ! msg=$(systemd-analyze verify "$tmp/streamgroup.service" 2>&1) || [[ -n "$msg" ]]; then
    echo "$msg"; echo "FAILED: systemd-analyze verify"; failed=1
  fi
else
  echo "skip: systemd-analyze not installed"
fi

if [[ $failed == 0 ]]; then echo "deploy/: all checks passed"; fi
exit $failed
