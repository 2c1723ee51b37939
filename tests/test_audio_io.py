"""Loading and checking impulse responses and curve files."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf

from roomcorr.audio_io import read_curve_file, read_ir_set, read_wav, write_wav
from roomcorr.errors import InputFileError


def _wav(path, data, fs=48000, subtype="FLOAT"):
    sf.write(str(path), np.asarray(data).T, fs, subtype=subtype)
    return path


@pytest.mark.parametrize("subtype", ["PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE"])
def test_common_subtypes_read(tmp_path, subtype):
    x = np.zeros((2, 9600))
    x[:, 100] = 0.5
    p = _wav(tmp_path / "a.wav", x, subtype=subtype)
    data, fs = read_wav(p)
    assert fs == 48000 and data.shape == (2, 9600)
    assert abs(data[0, 100] - 0.5) < 1e-4


def test_write_is_float32_and_atomic(tmp_path):
    p = write_wav(tmp_path / "f.wav", np.ones((1, 100)) * 0.25, 44100)
    info = sf.info(str(p))
    assert info.subtype == "FLOAT" and info.samplerate == 44100
    assert not list(tmp_path.glob(".roomcorr-tmp-*"))


def _ok(n=9600):
    x = np.zeros((2, n))
    x[:, 200] = 0.5
    x[:, 300:400] = 1e-3
    return x


@pytest.mark.parametrize(
    ("make", "msg"),
    [
        (lambda: np.where(np.arange(9600) == 5, np.nan, _ok()), "NaN"),
        (lambda: np.zeros((2, 9600)), "silent"),
        (lambda: _ok(2400), "ms long"),
        (
            lambda: np.concatenate([_ok()[:, :200], np.ones((2, 5)), _ok()[:, 205:]], axis=1),
            "clipped",
        ),
    ],
)
def test_bad_ir_named(tmp_path, make, msg):
    p = _wav(tmp_path / "bad.wav", make())
    with pytest.raises(InputFileError, match=msg) as err:
        read_ir_set([p])
    assert "bad.wav" in str(err.value)


def test_rate_and_channel_mismatch(tmp_path):
    a = _wav(tmp_path / "a.wav", _ok())
    b = _wav(tmp_path / "b.wav", _ok(), fs=44100)
    c = _wav(tmp_path / "c.wav", _ok()[:1])
    with pytest.raises(InputFileError, match="sample rate"):
        read_ir_set([a, b])
    with pytest.raises(InputFileError, match="channels"):
        read_ir_set([a, c])


def test_folder_and_padding(tmp_path):
    _wav(tmp_path / "p1.wav", _ok())
    _wav(tmp_path / "p2.wav", _ok(12000))
    irs, fs, files = read_ir_set([tmp_path])
    assert irs.shape == (2, 2, 12000) and [f.name for f in files] == ["p1.wav", "p2.wav"]


def test_not_audio(tmp_path):
    p = tmp_path / "x.wav"
    p.write_text("hello")
    with pytest.raises(InputFileError, match="x.wav"):
        read_ir_set([p])


def test_curve_file_skips_headers(tmp_path):
    p = tmp_path / "cal.txt"
    p.write_text('"Sens factor =-1.2dB"\nFreq(Hz)\tdB\n20, 1.5\n1000\t0.0 90\n20000;-2\n')
    f, g = read_curve_file(p)
    assert list(f) == [20, 1000, 20000] and list(g) == [1.5, 0.0, -2.0]


def test_curve_file_errors(tmp_path):
    p = tmp_path / "c.txt"
    p.write_text("100 abc\n")
    with pytest.raises(InputFileError, match="line 1"):
        read_curve_file(p)
    p.write_text("100 1\n")
    with pytest.raises(InputFileError, match="at least two"):
        read_curve_file(p)


def test_float_wavs_carry_no_time_stamp(tmp_path):
    # libsndfile stamps float WAVs with the time of writing (its PEAK chunk, which a plain
    # soundfile.write adds); roomcorr's writer leaves the chunk out, so the same filter is
    # the same bytes whenever it is written and a design can be checked byte for byte.
    import soundfile as sf

    from roomcorr.audio_io import write_wav

    x = np.linspace(-0.5, 0.5, 64)
    sf.write(tmp_path / "plain.wav", x, 48000, subtype="FLOAT")
    assert b"PEAK" in (tmp_path / "plain.wav").read_bytes()  # what the writer must avoid
    ours = write_wav(tmp_path / "a.wav", x, 48000).read_bytes()
    assert b"PEAK" not in ours
    back, fs = sf.read(tmp_path / "a.wav", dtype="float64")
    assert fs == 48000 and np.array_equal(back, x.astype(np.float32))
