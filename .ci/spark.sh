#!/usr/bin/env bash
# Java and pyspark for the Spark engine test: installs openjdk-17-jre-headless (Debian) when no
# java is found and we are root, and the project's `spark` extra into the venv when pyspark is
# missing. Idempotent and quick when both are there. Prints the java and pyspark versions.
set -euo pipefail
cd "$(dirname "$0")/.."
python="${PYTHON:-.venv/bin/python}"

if ! command -v java >/dev/null 2>&1; then
  if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
    echo "spark: installing openjdk-17-jre-headless" >&2
    export DEBIAN_FRONTEND=noninteractive
    # Debian's JRE post-install needs the man folder on slim images
    mkdir -p /usr/share/man/man1
    apt-get update -qq >&2 || true
    apt-get install -y -qq --no-install-recommends openjdk-17-jre-headless >/dev/null
  else
    echo "spark: no java found and cannot install (not root or no apt-get); the Spark test will skip" >&2
    exit 2
  fi
fi

if ! "$python" -c "import pyspark" >/dev/null 2>&1; then
  echo "spark: installing the project's spark extra (pyspark)" >&2
  "$python" -m pip install -q -e ".[spark]" >&2
fi

java -version 2>&1 | head -n 1
"$python" -c "import pyspark; print('pyspark', pyspark.__version__)"
