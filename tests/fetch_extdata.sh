#!/usr/bin/env bash
# Fetch the external reference data the tests compare against into .ext/ (idempotent).
# Debian package opencv-doc: examples/data/left01..14.jpg (real checkerboard photos with
# OpenCV's stored calibration left_intrinsics.yml) and graf1.png, graf3.png, H1to3p.xml
# (the ground-truth homography of the Oxford affine-region dataset).
set -euo pipefail
cd "$(dirname "$0")/.."
dest=.ext/opencv-doc
if [ -f "$dest/usr/share/doc/opencv-doc/examples/data/H1to3p.xml" ]; then exit 0; fi
mkdir -p .ext
tmp=$(mktemp -d)
( cd "$tmp" && apt-get download opencv-doc >/dev/null )
dpkg -x "$tmp"/opencv-doc_*.deb "$dest"
rm -rf "$tmp"
echo "fetched opencv-doc into $dest"
