"""Feature cache: valid entries are reused, stale or corrupt ones recomputed and rewritten."""

import numpy as np
import pytest

from labeler.model.cache import MAGIC, FeatureCache
from labeler.model.encoder import feature_shapes


def _tiles(n, size=(32, 32), seed=0):
    rng = np.random.default_rng(seed)
    return {
        f"sha{i:03d}:0,0,{size[0]},{size[1]}": rng.integers(0, 256, (*size, 3), dtype=np.uint8)
        for i in range(n)
    }


class Loader:
    """images_fn that records which keys it was asked for."""

    def __init__(self, tiles):
        self.tiles = tiles
        self.asked: list[str] = []

    def __call__(self, keys):
        self.asked += keys
        return [self.tiles[k] for k in keys]


def test_second_call_is_served_from_disk(tmp_path, pooling_encoder):
    tiles = _tiles(3)
    keys = list(tiles)
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    load = Loader(tiles)
    first = cache.get_or_compute(keys, load, pooling_encoder)
    assert load.asked == keys and cache.misses == 3 and cache.hits == 0
    again = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    load2 = Loader(tiles)
    second = again.get_or_compute(keys, load2, pooling_encoder)
    assert load2.asked == [] and again.hits == 3 and again.misses == 0
    for a, b in zip(first, second, strict=True):
        for x, y in zip(a, b, strict=True):
            assert x.dtype == y.dtype == np.float16
            np.testing.assert_array_equal(x, y)
    assert [tuple(x.shape) for x in second[0]] == [tuple(s) for s in feature_shapes(32, 32)]
    # the layout the callers rely on: <folder>/<encoder version>/..
    assert cache.path_for(keys[0]).relative_to(tmp_path).parts[0] == "pool-test-1"


def test_loaded_arrays_are_writable(tmp_path, pooling_encoder):
    tiles = _tiles(1)
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    cache.get_or_compute(list(tiles), Loader(tiles), pooling_encoder)
    feats = cache.load(next(iter(tiles)))
    assert feats is not None and all(a.flags.writeable for a in feats)


def _corrupt_truncate(path):
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def _corrupt_flip(path):
    data = bytearray(path.read_bytes())
    data[-10] ^= 0xFF
    data[-11] ^= 0x0F
    path.write_bytes(bytes(data))


def _corrupt_magic(path):
    data = path.read_bytes()
    path.write_bytes(b"XXXXXXXX" + data[len(MAGIC) :])


def _corrupt_empty(path):
    path.write_bytes(b"")


@pytest.mark.parametrize(
    "damage", [_corrupt_truncate, _corrupt_flip, _corrupt_magic, _corrupt_empty]
)
def test_damaged_entry_is_recomputed_and_rewritten(tmp_path, pooling_encoder, damage):
    tiles = _tiles(2)
    keys = list(tiles)
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    good = cache.get_or_compute(keys, Loader(tiles), pooling_encoder)
    path = cache.path_for(keys[1])
    healthy = path.read_bytes()
    damage(path)
    assert cache.load(keys[1]) is None
    load = Loader(tiles)
    again = cache.get_or_compute(keys, load, pooling_encoder)
    assert load.asked == [keys[1]]
    assert path.read_bytes() == healthy  # rewritten
    for x, y in zip(good[1], again[1], strict=True):
        np.testing.assert_array_equal(x, y)


def test_other_encoder_version_is_not_trusted(tmp_path, pooling_encoder):
    tiles = _tiles(2)
    keys = list(tiles)
    FeatureCache(tmp_path, encoder_version=pooling_encoder.version).get_or_compute(
        keys, Loader(tiles), pooling_encoder
    )
    pooling_encoder.version = "pool-test-2"
    newer = FeatureCache(tmp_path, encoder_version="pool-test-2")
    load = Loader(tiles)
    newer.get_or_compute(keys, load, pooling_encoder)
    assert load.asked == keys and newer.misses == 2
    assert newer.path_for(keys[0]).is_file()
    # a file of the old version copied to the new place is still refused (header check)
    old = FeatureCache(tmp_path, encoder_version="pool-test-1")
    newer.path_for(keys[0]).write_bytes(old.path_for(keys[0]).read_bytes())
    assert newer.load(keys[0]) is None


def test_entry_of_another_key_is_not_trusted(tmp_path, pooling_encoder):
    tiles = _tiles(2)
    a, b = list(tiles)
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    cache.get_or_compute([a, b], Loader(tiles), pooling_encoder)
    cache.path_for(b).write_bytes(cache.path_for(a).read_bytes())
    assert cache.load(b) is None
    load = Loader(tiles)
    cache.get_or_compute([a, b], load, pooling_encoder)
    assert load.asked == [b]


def test_entry_of_another_shape_is_stale(tmp_path, pooling_encoder):
    tiles = _tiles(1, size=(32, 32))
    key = next(iter(tiles))
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    cache.get_or_compute([key], Loader(tiles), pooling_encoder, tile_shapes=[(32, 32)])
    assert cache.load(key, tile_shape=(32, 32)) is not None
    assert cache.load(key, tile_shape=(64, 32)) is None
    bigger = {key: np.zeros((64, 32, 3), np.uint8)}
    load = Loader(bigger)
    out = cache.get_or_compute([key], load, pooling_encoder, tile_shapes=[(64, 32)])
    assert load.asked == [key]
    assert tuple(out[0][0].shape) == (24, 16, 8)
    assert cache.load(key, tile_shape=(64, 32)) is not None


def test_progress_counts_computed_entries(tmp_path, pooling_encoder):
    tiles = _tiles(5)
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    seen = []
    cache.get_or_compute(
        list(tiles),
        Loader(tiles),
        pooling_encoder,
        batch_size=1,
        progress=lambda d, t: seen.append((d, t)),
    )
    assert seen == [(4, 5), (5, 5)]  # chunks of 4 x batch_size


def test_no_temporary_files_are_left(tmp_path, pooling_encoder):
    tiles = _tiles(3)
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    cache.get_or_compute(list(tiles), Loader(tiles), pooling_encoder)
    files = [p for p in tmp_path.rglob("*") if p.is_file()]
    assert len(files) == 3 and all(p.suffix == ".feat" for p in files)


def test_encoder_of_other_version_is_refused(tmp_path, pooling_encoder):
    cache = FeatureCache(tmp_path, encoder_version="lite0-abc-r1")
    with pytest.raises(
        ValueError,
        match=r"encoder: its version 'pool-test-1' differs from the cache's 'lite0-abc-r1'",
    ):
        cache.get_or_compute(["k"], Loader({"k": np.zeros((8, 8, 3), np.uint8)}), pooling_encoder)


def test_wrong_number_of_images_is_refused(tmp_path, pooling_encoder):
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    with pytest.raises(ValueError, match=r"images_fn: expected 2 images .* got 1"):
        cache.get_or_compute(
            ["a", "b"], lambda keys: [np.zeros((8, 8, 3), np.uint8)], pooling_encoder
        )


def test_image_of_wrong_shape_is_refused(tmp_path, pooling_encoder):
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    with pytest.raises(
        ValueError, match=r"images_fn: image of key 'a' has shape \(8, 8, 3\), expected \(16, 16\)"
    ):
        cache.get_or_compute(
            ["a"],
            lambda keys: [np.zeros((8, 8, 3), np.uint8)],
            pooling_encoder,
            tile_shapes=[(16, 16)],
        )


@pytest.mark.parametrize("version", ["", "../up", "a/b", "x" * 200, None])
def test_unsafe_encoder_version_is_refused(tmp_path, version):
    with pytest.raises(ValueError, match="encoder_version: expected 1-128 letters"):
        FeatureCache(tmp_path, encoder_version=version)


def test_store_checks_shapes(tmp_path):
    cache = FeatureCache(tmp_path, encoder_version="v1")
    with pytest.raises(ValueError, match=r"features: expected level shapes"):
        cache.store("k", [np.zeros((24, 8, 8), np.float16)], tile_shape=(32, 32))
    with pytest.raises(ValueError, match="key: expected a non-empty string"):
        cache.path_for("")


def test_real_encoder_round_trip(tmp_path, encoder):
    tiles = _tiles(2, size=(64, 64), seed=3)
    cache = FeatureCache(tmp_path, encoder_version=encoder.version)
    out = cache.get_or_compute(list(tiles), Loader(tiles), encoder)
    direct = encoder.forward_features(np.stack(list(tiles.values())))
    for lvl in range(4):
        # float16 storage: relative rounding 2**-11 (IEEE 754 half precision)
        ref = direct[lvl][1].numpy()
        np.testing.assert_allclose(out[1][lvl].astype(np.float32), ref, rtol=2**-10, atol=1e-3)


def test_precision_is_recorded_and_a_float32_cache_reads_float32_only(tmp_path, pooling_encoder):
    tiles = _tiles(2)
    keys = list(tiles)
    low = FeatureCache(tmp_path, encoder_version=pooling_encoder.version, precision="bfloat16")
    low.get_or_compute(keys, Loader(tiles), pooling_encoder)
    assert low.misses == 2
    # a bfloat16 reader (proposing) uses the entries of either precision
    again = FeatureCache(tmp_path, encoder_version=pooling_encoder.version, precision="bfloat16")
    again.get_or_compute(keys, Loader(tiles), pooling_encoder)
    assert again.hits == 2 and again.misses == 0
    # a float32 reader (training) recomputes them in float32 and rewrites them
    exact = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    load = Loader(tiles)
    exact.get_or_compute(keys, load, pooling_encoder)
    assert load.asked == keys and exact.misses == 2
    # now float32 entries: both readers use them
    for precision in ("float32", "bfloat16"):
        c = FeatureCache(tmp_path, encoder_version=pooling_encoder.version, precision=precision)
        c.get_or_compute(keys, Loader(tiles), pooling_encoder)
        assert c.hits == 2, precision


def test_entry_without_precision_reads_as_float32(tmp_path, pooling_encoder):
    import json
    import struct

    tiles = _tiles(1)
    (key,) = tiles
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version, precision="bfloat16")
    cache.get_or_compute([key], Loader(tiles), pooling_encoder)
    path = cache.path_for(key)
    data = path.read_bytes()
    (n,) = struct.unpack("<I", data[len(MAGIC) : len(MAGIC) + 4])
    header = json.loads(data[len(MAGIC) + 4 : len(MAGIC) + 4 + n])
    del header["precision"]  # as written before the precision was recorded
    blob = json.dumps(header, sort_keys=True).encode()
    path.write_bytes(MAGIC + struct.pack("<I", len(blob)) + blob + data[len(MAGIC) + 4 + n :])
    exact = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    assert exact.load(key) is not None


def test_precision_mismatch_is_refused(tmp_path, encoder):
    import copy

    from labeler.model.encoder import with_precision

    low = with_precision(copy.deepcopy(encoder), "bfloat16")
    cache = FeatureCache(tmp_path, encoder_version=encoder.version)
    with pytest.raises(ValueError, match="encoder: it runs in bfloat16, the cache records float32"):
        cache.get_or_compute(["k"], lambda ks: [np.zeros((8, 8, 3), np.uint8)], low)
    with pytest.raises(ValueError, match="precision: expected 'float32' or 'bfloat16', got 'half'"):
        FeatureCache(tmp_path, encoder_version=encoder.version, precision="half")
