#!/usr/bin/env bash
# Validates every manifest in deploy/ against the Kubernetes API schemas, offline: kubernetes-validate (PyPI)
# carries the schemas of each version it supports. Strict mode, so a misspelt or misplaced field is an error
# rather than something the API server would drop without a word.
#
#   scripts/validate_deploy.sh                       # against Kubernetes 1.30, the oldest the manifests are
#                                                    # meant for (preStop sleep is on by default from 1.30)
#   K8S_VERSION=1.33.0 scripts/validate_deploy.sh    # another version the installed package knows
#
# Installs kubernetes-validate with pip when it is missing (the only step that needs the network), pinned to
# the release tried here (1.37, which ships the schemas of Kubernetes 1.25 to 1.37).
set -euo pipefail
cd "$(dirname "$0")/.."

K8S_VERSION=${K8S_VERSION:-1.30.0}
if ! command -v kubernetes-validate >/dev/null; then
    python3 -m pip install --quiet --disable-pip-version-check --root-user-action=ignore 'kubernetes-validate>=1.37,<1.38'
fi
echo "kubernetes-validate $(kubernetes-validate --version), Kubernetes $K8S_VERSION"
shopt -s nullglob
manifests=(deploy/*.yaml deploy/*.yml)
[ ${#manifests[@]} -gt 0 ] || { echo "no manifests in deploy/" >&2; exit 1; }
kubernetes-validate --strict --kubernetes-version "$K8S_VERSION" "${manifests[@]}"
