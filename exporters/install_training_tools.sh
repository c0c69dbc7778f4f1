#!/usr/bin/env bash
# Debian packages the training pipeline needs (run as root): espeak-ng; the voices recorded from
# real people (MBROLA diphone databases, SVOX pico), which live in the contrib and non-free
# components, added here; real music for the channel augmentation; codecs.
set -euo pipefail
if [ -f /etc/apt/sources.list.d/debian.sources ]; then
  sed -i 's/^Components: main$/Components: main contrib non-free/' /etc/apt/sources.list.d/debian.sources
elif [ -f /etc/apt/sources.list ]; then
  sed -i -E '/^deb /{/contrib/!s/ main$/ main contrib non-free/}' /etc/apt/sources.list
fi
apt-get update -qq
apt-get install -y -qq espeak-ng sox libsox-fmt-all ffmpeg codec2 wesnoth-1.16-music libttspico-utils mbrola \
  mbrola-af1 mbrola-br1 mbrola-br3 mbrola-cz1 mbrola-cz2 mbrola-de1 mbrola-de2 mbrola-de4 mbrola-de6 mbrola-ee1 \
  mbrola-es1 mbrola-es2 mbrola-fr1 mbrola-fr4 mbrola-hu1 mbrola-id1 mbrola-it3 mbrola-it4 mbrola-nl2 mbrola-nl3 \
  mbrola-pl1 mbrola-pt1 mbrola-ro1 mbrola-tr1 mbrola-tr2
