#!/usr/bin/env sh
# The whole job on an invented session: render it, calibrate the rig, define the still-water
# datum, match the wave run, compute heights, draw a preview and assess the result against the
# exact truth; then the wave analysis (spectrum, modes) on a second run of the same rig, in which
# plane waves are scattered by a post. Usage: sh examples/demo.sh [OUTDIR] [--full]
# (--full renders the 1280x1024 sessions: over 10 minutes on 2 cores; the quick ones about 2.)
set -eu
out=${1:-demo-session}
size=--quick
# The quick sessions' waves cover few pixels: a 15 px window then spans enough of a wave that the
# first-order shape function smooths the crests (about 5 % low) and its 1-sigma is optimistic.
# The second-order shape function with a larger window follows the curvature (docs/performance.md).
shape="--shape-order 2 --window 21"
if [ "${2:-}" = "--full" ]; then size=""; shape=""; fi

surfrec synth "$out" $size --force -q
cd "$out"
surfrec calibrate --left 'target/left/*.png' --right 'target/right/*.png' --board 11x8 --square 15 \
    -o rig.json --report calibration.png --force -q
surfrec datum --rig rig.json --left still/left --right still/right -o datum.h5 --force -q
surfrec match --rig rig.json --datum datum.h5 --left waves/left --right waves/right \
    --timestamps waves/timestamps.csv $shape -o disparity.h5 --force -q
surfrec heights disparity.h5 --rig rig.json --datum datum.h5 -o heights.h5 --force -q
surfrec preview heights.h5 --frame 0 --point 20,10 -o preview.png --force -q
surfrec assess heights.h5 --truth truth.h5

# Wave analysis. The waves run above is 6 frames (24 with --full) of a 5 Hz wave, a fraction of a
# period: too short for a spectrum. A second run of the same rig (same calibration, same still
# water, so rig.json and datum.h5 serve it too) records whole periods of waves scattered by a post.
echo
surfrec synth scatter $size --scenario scatter --force -q
surfrec match --rig rig.json --datum datum.h5 --left scatter/waves/left --right scatter/waves/right \
    --timestamps scatter/waves/timestamps.csv $shape -o scatter/disparity.h5 --force -q
surfrec heights scatter/disparity.h5 --rig rig.json --datum datum.h5 -o scatter/heights.h5 --force -q
surfrec spectrum scatter/heights.h5 --depth 60 -o scatter/spectrum --force -q
# The post's centre is estimated here (its datum-frame position is not known to the demo): across the
# incident wave by a symmetric-scatterer fit (to about 0.1 mm), along it from the hole the post leaves
# (about 1 mm off, which moves |R_m| by up to about 6%); with a measured --centre X,Y, |R_m| comes out
# within about 1% of 1.
surfrec modes scatter/heights.h5 --radii 50,100 --depth 60 -o scatter/modes --force -q
echo
echo "pictures: $(pwd)/calibration.png $(pwd)/preview.png"
echo "          $(pwd)/scatter/spectrum/spectrum.png $(pwd)/scatter/spectrum/frequency_wavenumber.png"
echo "          $(pwd)/scatter/modes/reflection.png $(pwd)/scatter/modes/amplitude.png"
