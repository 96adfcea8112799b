#!/usr/bin/env sh
# The whole job on an invented session: render it, calibrate the rig, define the still-water
# datum, match the wave run, compute heights, draw a preview and assess the result against the
# exact truth. Usage: sh examples/demo.sh [OUTDIR] [--full]
# (--full renders the 1280x1024 default session: about 6 minutes on 2 cores; the quick one about 1.)
set -eu
out=${1:-demo-session}
size=--quick
if [ "${2:-}" = "--full" ]; then size=""; fi

surfrec synth "$out" $size --force -q
cd "$out"
surfrec calibrate --left 'target/left/*.png' --right 'target/right/*.png' --board 11x8 --square 15 \
    -o rig.json --report calibration.png --force -q
surfrec datum --rig rig.json --left still/left --right still/right -o datum.h5 --force -q
surfrec match --rig rig.json --datum datum.h5 --left waves/left --right waves/right \
    --timestamps waves/timestamps.csv -o disparity.h5 --force -q
surfrec heights disparity.h5 --rig rig.json --datum datum.h5 -o heights.h5 --force -q
surfrec preview heights.h5 --frame 0 --point 20,10 -o preview.png --force -q
surfrec assess heights.h5 --truth truth.h5
echo
echo "pictures: $(pwd)/calibration.png $(pwd)/preview.png"
