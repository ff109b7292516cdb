#!/usr/bin/env bash
# Install the Debian packages specflow's tests use, when missing. Safe to run repeatedly.
set -euo pipefail
need=()
command -v pdflatex >/dev/null 2>&1 || need+=(texlive-latex-base texlive-latex-recommended texlive-latex-extra texlive-science)
command -v kpsewhich >/dev/null 2>&1 && kpsewhich lmodern.sty >/dev/null 2>&1 || need+=(lmodern)
command -v pdftotext >/dev/null 2>&1 || need+=(poppler-utils)
command -v chromium >/dev/null 2>&1 || need+=(chromium)
command -v slurmctld >/dev/null 2>&1 || need+=(slurm-wlm)
command -v munged >/dev/null 2>&1 || need+=(munge)
if [ ${#need[@]} -eq 0 ]; then exit 0; fi
if [ "$(id -u)" != "0" ] || ! command -v apt-get >/dev/null 2>&1; then
  echo "sysdeps: not installing (${need[*]}): needs root and apt-get; the tests that need them will be skipped" >&2
  exit 0
fi
echo "sysdeps: installing ${need[*]}" >&2
export DEBIAN_FRONTEND=noninteractive
apt-get update -qq >/dev/null
apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
