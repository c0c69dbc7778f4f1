#!/usr/bin/env bash
# Rebuild every model file from scratch (about 2.5 hours on 2 CPU cores), into models/ unless OUT is set.
#   bash exporters/rebuild.sh            # as root on Debian: installs the tools first
set -euo pipefail
cd "$(dirname "$0")/.."
OUT="${OUT:-models}"
bash exporters/install_training_tools.sh
python -m pip install -q -e '.[test,train]'
python exporters/synth.py --words 300 --renditions 3 --out runs/synth2.pkl                      # ~4 min
python -m exporters.train --synth runs/synth2.pkl --minutes 60 --variants 2 --out "$OUT"          # ~75 min
python -m exporters.train_letters --synth runs/synth2.pkl --items "$(ls runs/items2-v2-*.pkl | head -n 1)" --minutes 25 --models "$OUT"  # ~35 min
python -m exporters.fit_rescoring --models "$OUT"                                                # ~15 min
python -m exporters.fit_background --models "$OUT"                                               # ~8 min
TRAWL_MODELS="$OUT" python tests/benchmarks/bench_embeddings.py --write-card
python -m exporters.model_card --models "$OUT"
