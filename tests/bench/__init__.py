"""`make bench`: knowngood against peers (PatchCore's patch memory on the same pretrained backbone, and plain ones)
on elpv and the demo parts (one of them as large images, tiled), a per-term ablation, speed and memory figures."""
