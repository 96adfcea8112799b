#!/usr/bin/env sh
# The surfrec pipeline on an invented session. Stages are added here as they land.
set -eu
out=${1:-demo-session}
surfrec synth "$out" --quick --force
surfrec inspect "$out/truth.h5"
