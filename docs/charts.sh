#!/usr/bin/env sh
# Redraws the charts the README shows, from the repository's root:
#   sh docs/charts.sh            (with baton on the PATH)
#   BATON="cargo run --release --" sh docs/charts.sh
set -eu
baton=${BATON:-baton}
$baton run scenarios/unbalanced-split.yaml --svg docs/unbalanced-split.svg >/dev/null
$baton run scenarios/unbalanced-split.yaml --set 'pipeline.split=[4, 3, 3, 2]' --svg docs/rebalanced-split.svg >/dev/null
$baton run scenarios/interleaved.yaml --svg docs/interleaved.svg >/dev/null
$baton run scenarios/heavy-head.yaml --svg docs/heavy-head-even.svg --memory-svg docs/heavy-head-even-memory.svg >/dev/null
split=$(mktemp -d)
$baton split scenarios/heavy-head.yaml --apply "$split/heavy-head-split.yaml" >/dev/null
$baton run "$split/heavy-head-split.yaml" --svg docs/heavy-head-split.svg --memory-svg docs/heavy-head-split-memory.svg >/dev/null
rm -r "$split"
$baton sweep scenarios/choose-m.yaml --vary pipeline.micro_batches=8..128*2 \
  --vary pipeline.schedule=fill-drain,1f1b,interleaved --vary pipeline.chunks=1,2 --svg docs/choose-m-sweep.svg >/dev/null
$baton run scenarios/two-boxes.yaml --svg docs/two-boxes-packed.svg >/dev/null
$baton run scenarios/two-boxes.yaml --set placement=spread --svg docs/two-boxes-spread.svg >/dev/null
$baton run scenarios/replicas.yaml --svg docs/replicas.svg >/dev/null
$baton layout scenarios/layout.yaml --global-batch 256 --svg docs/layout.svg >/dev/null
$baton compare scenarios/zero-bubble.yaml --vary pipeline.schedule=1f1b,zb-h1,zb-h2,zb-auto --svg docs/zero-bubble.svg >/dev/null
