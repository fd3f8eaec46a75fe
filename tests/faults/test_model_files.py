"""Damaged, forged and hostile model, checkpoint and config files: each refused with one
clear line, and nothing is ever unpickled or executed from them."""

from __future__ import annotations

import io
import json
import pickle
import zipfile

import numpy as np
import pytest
from _faultkit import FIT_OPTIONS, SETTINGS, invoke, no_traceback, write_good_clips

from timbrel import ModelFileError, TimbrelError
from timbrel.model import read_model_file
from timbrel.model._files import canonical_json, content_digest
from timbrel.training import checkpoint_path


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    root = tmp_path_factory.mktemp("trained")
    write_good_clips(root / "audio", 4)
    assert invoke("frames", root / "audio", "--out", root / "cache", "-q", "-j", "1",
                  *SETTINGS).exit_code == 0
    assert invoke("fit", root / "cache", "--out", root / "model.npz", "-q",
                  *FIT_OPTIONS).exit_code == 0
    return root


def _refused_by_every_command(path, trained, tmp_path, fragment: str) -> None:
    """`inspect`, `export` and `show` each refuse the file in one line naming it."""
    for args in (["inspect", path],
                 ["export", trained / "audio", "--model", path, "--out", tmp_path / "ds", "-q",
                  "-j", "1"],
                 ["show", trained / "audio" / "good00.wav", "--model", path, "--out",
                  tmp_path / "clip.png"]):
        result = invoke(*args)
        no_traceback(result)
        assert result.exit_code == 1, result.output
        lines = [ln for ln in result.output.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith(f"timbrel: error: {path}: "), lines
        assert fragment in lines[0], lines[0]
    assert not (tmp_path / "ds").exists() or not list((tmp_path / "ds").glob("part-*"))
    assert not (tmp_path / "clip.png").exists()


def _rewrite(src, dst, *, header_change=None, array_change=None, resign=True) -> None:
    """Copy a model file changing its header or arrays; ``resign`` recomputes the checksum
    (with the writer's own digest) so that the content check, not the checksum, is tested."""
    with np.load(src, allow_pickle=False) as archive:
        arrays = {k: archive[k] for k in archive.files}
    header = json.loads(arrays.pop("header").tobytes())
    if header_change:
        header_change(header)
    if array_change:
        array_change(arrays)
    if resign:
        header.pop("checksum")
        listed = header["param_arrays"] + [f"user.{n}" for n in header["user_arrays"]]
        header["checksum"] = content_digest([(n, arrays[n]) for n in listed], header)
    arrays["header"] = np.frombuffer(canonical_json(header).encode(), np.uint8)
    with open(dst, "wb") as fh:
        np.savez(fh, **arrays)


@pytest.mark.parametrize("keep", [0, 4, 100, 0.5, -22, -1])
def test_truncated_model(keep, trained, tmp_path):
    data = (trained / "model.npz").read_bytes()
    n = int(len(data) * keep) if isinstance(keep, float) else (keep if keep >= 0
                                                               else len(data) + keep)
    (tmp_path / "cut.npz").write_bytes(data[:n])
    # under 4 bytes there is not even the zip signature (PKWARE APPNOTE: 'PK\x03\x04')
    fragment = "not a model file" if n < 4 else "truncated"
    _refused_by_every_command(tmp_path / "cut.npz", trained, tmp_path, fragment)


def test_every_single_bit_flip_is_refused_or_harmless(trained, tmp_path):
    """Flip one bit at every 3rd byte. zip keeps a CRC-32 per member (PKWARE APPNOTE) and
    the header a SHA-256 of the content, so a flip is refused, unless it lands in zip
    bookkeeping that no reader uses (times, attributes): then the parameters read back
    bit-identical. Never a different model, never another error."""
    data = bytearray((trained / "model.npz").read_bytes())
    original = read_model_file(trained / "model.npz").rbm
    path = tmp_path / "flipped.npz"
    refused = harmless = 0
    for pos in range(0, len(data), 3):
        data[pos] ^= 1 << (pos % 8)
        path.write_bytes(data)
        data[pos] ^= 1 << (pos % 8)
        try:
            rbm = read_model_file(path).rbm
        except ModelFileError:
            refused += 1
            continue
        for name in ("weights_", "visible_bias_", "hidden_bias_", "sigma_"):
            assert np.array_equal(getattr(rbm, name), getattr(original, name)), (pos, name)
        assert rbm.get_params() == original.get_params()
        harmless += 1
    assert refused > 0.9 * (refused + harmless), (refused, harmless)
    # one flip in the middle of the weights, through the command line
    data[len(data) // 3] ^= 0x10
    path.write_bytes(data)
    _refused_by_every_command(path, trained, tmp_path, "")


@pytest.mark.parametrize(("version", "fragment"), [(99, "newer than this timbrel reads"),
                                                   (0, "invalid format version"),
                                                   ("1", "invalid format version")])
def test_wrong_format_version(version, fragment, trained, tmp_path):
    _rewrite(trained / "model.npz", tmp_path / "v.npz",
             header_change=lambda h: h.update(format_version=version))
    _refused_by_every_command(tmp_path / "v.npz", trained, tmp_path, fragment)


@pytest.mark.parametrize("array", ["param.weights", "param.hidden_bias", "param.visible_bias"])
@pytest.mark.parametrize("value", [np.nan, np.inf])
def test_non_finite_parameters(array, value, trained, tmp_path):
    def poison(arrays):
        arrays[array] = arrays[array].copy()
        arrays[array].flat[0] = value

    _rewrite(trained / "model.npz", tmp_path / "nan.npz", array_change=poison)
    _refused_by_every_command(tmp_path / "nan.npz", trained, tmp_path,
                              f"array '{array}' holds NaN or infinite values")


def test_checksum_catches_an_unsigned_change(trained, tmp_path):
    def nudge(arrays):
        arrays["param.weights"] = arrays["param.weights"] * np.float32(1.0001)

    _rewrite(trained / "model.npz", tmp_path / "edited.npz", array_change=nudge, resign=False)
    _refused_by_every_command(tmp_path / "edited.npz", trained, tmp_path, "checksum mismatch")


def test_front_end_that_disagrees_with_the_weights(trained, tmp_path):
    # header says 20 mel bands, weights were trained on 16: refused before any audio is read
    def twenty_bands(header):
        header["metadata"]["config"]["frontend"]["n_mels"] = 20

    _rewrite(trained / "model.npz", tmp_path / "fe.npz", header_change=twenty_bands)
    _refused_by_every_command(tmp_path / "fe.npz", trained, tmp_path,
                              "band statistics do not match 20 bands")


def test_front_end_that_disagrees_with_the_data(trained, tmp_path):
    # a cache framed with 20 bands cannot feed a 16-band model, nor train with 16 bands
    assert invoke("frames", trained / "audio", "--out", tmp_path / "c20", "-q", "-j", "1",
                  "--set", "frontend.n_mels=20").exit_code == 0
    export = invoke("export", tmp_path / "c20", "--model", trained / "model.npz", "--out",
                    tmp_path / "ds", "-q", "-j", "1")
    no_traceback(export)
    assert export.exit_code == 1 and "other front-end settings" in export.output
    config = tmp_path / "c.toml"
    config.write_text("[frontend]\nn_mels = 16\ncontext = 1\n")
    fit = invoke("fit", tmp_path / "c20", "--out", tmp_path / "m.npz", "-q", "--config", config,
                 *FIT_OPTIONS)
    no_traceback(fit)
    assert fit.exit_code == 1 and "n_mels: config 16, cache 20" in fit.output
    assert not (tmp_path / "m.npz").exists()


class _Marker:
    """Unpickling this calls open(path, 'w'): a file appears if anything unpickles it."""

    def __init__(self, path):
        self.path = str(path)

    def __reduce__(self):
        return (open, (self.path, "w"))


def _hostile_files(folder, marker):
    payload = pickle.dumps(_Marker(marker))
    (folder / "pickle.npz").write_bytes(payload)
    (folder / "pickle.toml").write_bytes(payload)
    buf = io.BytesIO()
    np.save(buf, np.array([_Marker(marker)], dtype=object), allow_pickle=True)
    with zipfile.ZipFile(folder / "object_member.npz", "w") as zf:  # an .npz with a pickle
        zf.writestr("header.npy", buf.getvalue())
        zf.writestr("param.weights.npy", buf.getvalue())
    return payload


def test_pickles_are_never_loaded(trained, tmp_path):
    marker = tmp_path / "PWNED"
    payload = _hostile_files(tmp_path, marker)
    with pytest.raises(FileNotFoundError):  # the payload is live: loading it would act
        marker.stat()
    for name, fragment in (("pickle.npz", "not a model file"),
                           ("object_member.npz", "pickled object array")):
        _refused_by_every_command(tmp_path / name, trained, tmp_path, fragment)
    config = invoke("frames", trained / "audio", "--out", tmp_path / "c", "-q", "--config",
                    tmp_path / "pickle.toml")
    no_traceback(config)
    assert config.exit_code == 1 and "pickle.toml" in config.output
    # a checkpoint holding a pickle: fit --resume refuses it
    model = tmp_path / "m.npz"
    checkpoint_path(model).write_bytes(payload)
    resume = invoke("fit", trained / "cache", "--out", model, "-q", "--resume", *FIT_OPTIONS)
    no_traceback(resume)
    assert resume.exit_code == 1 and "checkpoint" in resume.output
    assert not marker.exists()
    pickle.loads(payload)  # the control: the same bytes do create the marker when unpickled
    assert marker.exists()


@pytest.mark.parametrize("damage", ["truncated", "bit_flip", "zeros", "other_config",
                                    "missing_state"])
def test_damaged_checkpoint_is_refused_on_resume(damage, trained, tmp_path):
    model = tmp_path / "m.npz"
    args = ["fit", trained / "cache", "--out", model, "-q", *FIT_OPTIONS]
    assert invoke(*args).exit_code == 0
    ckpt = checkpoint_path(model)
    data = bytearray(ckpt.read_bytes())
    if damage == "truncated":
        data = data[: len(data) // 2]
    elif damage == "bit_flip":
        data[len(data) // 2] ^= 0x04
    elif damage == "zeros":
        data = bytearray(len(data))
    ckpt.write_bytes(bytes(data))
    if damage in ("other_config", "missing_state"):
        with np.load(ckpt, allow_pickle=False) as archive:
            arrays = {k: archive[k] for k in archive.files}
        header = json.loads(arrays["header"].tobytes())
        if damage == "other_config":
            header["config"]["model"]["n_hidden"] = 9
        else:
            arrays = {k: v for k, v in arrays.items() if not k.startswith("state/")}
        arrays["header"] = np.frombuffer(json.dumps(header).encode(), np.uint8)
        with open(ckpt, "wb") as fh:
            np.savez(fh, **arrays)
    model.unlink()
    result = invoke(*args, "--resume")
    no_traceback(result)
    assert result.exit_code == 1, result.output
    lines = [ln for ln in result.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and str(ckpt) in lines[0], lines
    assert not model.exists()


def test_model_errors_are_timbrel_errors():
    assert issubclass(ModelFileError, TimbrelError)
