"""The bundle: round trip, and a clear refusal of anything corrupt, truncated, newer or pickled."""

import dataclasses
import io
import json
import pickle
import zipfile

import numpy as np
import pytest
from knowngood.training import bundle
from knowngood.training.errors import BadBundle


def _rezip(src: bytes, manifest_edit=None, weights: bytes | None = None) -> bytes:
    with zipfile.ZipFile(io.BytesIO(src)) as zf:
        manifest = json.loads(zf.read("manifest.json"))
        w = zf.read("weights.safetensors")
    if manifest_edit:
        manifest_edit(manifest)
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as zf:
        zf.writestr("manifest.json", json.dumps(manifest))
        zf.writestr("weights.safetensors", w if weights is None else weights)
    return out.getvalue()


def test_round_trip_keeps_scores(tiny_bundle, tiny_good_images):
    det, frechet = bundle.load(tiny_bundle)
    again, _ = bundle.from_bytes(bundle.to_bytes(det, frechet))
    a = [r.score for r in det.inspect(tiny_good_images[:4])]
    b = [r.score for r in again.inspect(tiny_good_images[:4])]
    assert a == b and again.model_id == det.model_id and set(frechet) >= {"train_mu", "train_sigma"}


def test_same_content_gives_same_bytes(tiny_bundle):
    det, frechet = bundle.load(tiny_bundle)
    assert bundle.to_bytes(det, frechet) == bundle.to_bytes(det, frechet)


def test_truncated_and_garbage_are_refused(tiny_bundle):
    data = tiny_bundle.read_bytes()
    for bad in (data[: len(data) // 2], b"", b"PK\x03\x04 nonsense"):
        with pytest.raises(BadBundle, match="truncated or corrupt|not a readable"):
            bundle.from_bytes(bad, name="m.kgm")


def test_newer_format_names_both_versions(tiny_bundle):
    newer = _rezip(tiny_bundle.read_bytes(), lambda m: m.update(format_version=99))
    with pytest.raises(BadBundle, match="format 99 is newer"):
        bundle.from_bytes(newer)


def test_wrong_shapes_and_unknown_settings_are_refused(tiny_bundle):
    data = tiny_bundle.read_bytes()
    with pytest.raises(BadBundle, match="weights do not match|has shape"):
        bundle.from_bytes(_rezip(data, lambda m: m["model"].update(width=16)))
    with pytest.raises(BadBundle, match="unknown ModelConfig keys: colour"):
        bundle.from_bytes(_rezip(data, lambda m: m["model"].update(colour=1)))


def test_pickled_weights_are_never_unpickled(tiny_bundle):
    class Boom:
        def __reduce__(self):
            return (exec, ("raise SystemExit('unpickled!')",))

    with pytest.raises(BadBundle, match="corrupt"):
        bundle.from_bytes(_rezip(tiny_bundle.read_bytes(), weights=pickle.dumps(Boom())))


def test_frechet_arrays_survive(tiny_bundle):
    _, frechet = bundle.load(tiny_bundle)
    assert frechet["train_sigma"].shape == (frechet["train_mu"].shape[0],) * 2
    assert np.isfinite(frechet["holdout_features"]).all()


# what each older format lacked, and the settings that reproduce its scores
_NEW_IN_5 = ("memory_pool",)  # format 4's memories searched every 4 px: memory_pool 1, the default
_NEW_IN_4 = ("pixel", "memory", "adversarial", "memory_size", "height", "tile", *_NEW_IN_5)
_NO_POSITION_FREE = {"memory": 0.0, "adversarial": 0.0}
OLDER_FORMATS = {
    1: ({"perceptual": 0.0, "residual_shift": 0, **_NO_POSITION_FREE}, ("perceptual", "residual_shift", *_NEW_IN_4)),
    2: ({"residual_shift": 0, **_NO_POSITION_FREE}, ("residual_shift", *_NEW_IN_4)),
    3: (_NO_POSITION_FREE, _NEW_IN_4),
    4: ({"memory_pool": 1}, _NEW_IN_5),
}


@pytest.mark.parametrize("version", sorted(OLDER_FORMATS))
def test_older_format_bundle_loads_and_scores_as_it_was_fitted(tiny_bundle, tiny_good_images, version):
    settings, absent = OLDER_FORMATS[version]
    det, frechet = bundle.load(tiny_bundle)
    cfg = dataclasses.replace(det.cfg, **settings)
    graph = bundle.new_graph(cfg)
    kept = ("encoder", "generator", "critic", "perceptual")
    nets = {k: v for k, v in det.graph.state_dict().items() if k.split(".")[0] in kept}
    graph.load_state_dict(nets, strict=False)  # the same nets; statistics fitted below
    graph.fit_features(det.prepare(tiny_good_images))
    graph.fit_standardisation(det.prepare(tiny_good_images))
    old = dataclasses.replace(det, cfg=cfg, graph=graph)

    def as_older(m):
        m["format_version"] = version
        for key in absent:
            del m["model"][key]  # that format had no such setting

    loaded, _ = bundle.from_bytes(_rezip(bundle.to_bytes(old, frechet), as_older))
    assert all(getattr(loaded.cfg, k) == v for k, v in settings.items())
    assert (loaded.graph.perceptual is None) == (not cfg.pretrained)
    assert [r.score for r in loaded.inspect(tiny_good_images[:3])] == [
        r.score for r in old.inspect(tiny_good_images[:3])
    ]
