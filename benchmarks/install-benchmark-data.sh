#!/usr/bin/env bash
# Installs the Debian packages whose photographs the quality benchmark reads
# (benchmarks/collection.py, SOURCES):
#   opencv-doc       OpenCV's sample images (/usr/share/doc/opencv-doc/examples), ~270 MB
#   scratch          Scratch 1.4's backdrops (/usr/share/scratch/Media/Backgrounds), ~45 MB
#                    plus the Squeak VM it depends on
#   stellarium-data  Stellarium's deep-sky textures (/usr/share/stellarium/nebulae), ~390 MB
# The benchmark skips, with a warning, any of them that is missing. Its PyPI photo sources come
# with the project: scikit-learn and matplotlib are dependencies, scikit-image and imagehash
# (which brings PyWavelets) are in the `test` extra.
#
#   bash benchmarks/install-benchmark-data.sh      # as root, or with sudo available
set -euo pipefail

packages=(opencv-doc scratch stellarium-data)

sudo=()
if [ "$(id -u)" -ne 0 ]; then
    sudo=(sudo)
fi

"${sudo[@]}" env DEBIAN_FRONTEND=noninteractive apt-get update
"${sudo[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends "${packages[@]}"
