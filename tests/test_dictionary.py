"""Harmonic dictionary: partial positions (ISO 16, stiff-string formula), lobe shape vs librosa's VQT,
harmonic-constrained adaptation, save/load."""

from __future__ import annotations

import numpy as np
import pytest

from takescribe.transcription.dictionary import adapt_dictionary, harmonic_dictionary, load_dictionary, save_dictionary
from takescribe.errors import DictionaryError, OutputError
from takescribe.transcription.nmf import decompose
from takescribe.features.spectrogram import ANALYSIS_SR, compute_spectrogram

SR = ANALYSIS_SR


def _axis():
    t = np.arange(SR) / SR
    return compute_spectrogram(np.sin(2 * np.pi * 440 * t).astype(np.float32), SR, tuning=0.0)


def test_partials_sit_at_integer_multiples_for_harmonic_instruments():
    spec = _axis()
    d = harmonic_dictionary(spec, instrument="violin")
    k = list(d.pitches).index(69)  # A4 = 440 Hz (ISO 16)
    w = d.W[:, k]
    for n in (1, 2, 3, 4):
        b = int(round(36 * np.log2(n * 440.0 / spec.frequencies[0])))
        assert w[b] == pytest.approx(w[max(b - 2, 0): b + 3].max())


def test_piano_partials_follow_the_stiff_string_formula():
    # f_n = n f0 sqrt(1 + B n^2) (Fletcher 1964): high partials of a treble note are sharp
    spec = _axis()
    d = harmonic_dictionary(spec, instrument="piano")
    k = list(d.pitches).index(84)
    n = 5
    B = 10 ** (-4.2 + 0.024 * (84 - 21))
    f0 = 440.0 * 2 ** ((84 - 69) / 12)
    fn = n * f0 * np.sqrt(1 + B * n * n)
    lobe = d.lobes[:, k, n - 1]
    centre = np.sum(np.arange(len(lobe)) * lobe) / lobe.sum()
    assert spec.frequencies[0] * 2 ** (centre / 36) == pytest.approx(fn, rel=0.004)
    assert fn > n * f0 * 1.0005


@pytest.mark.parametrize("freq", [110.0, 440.0, 1760.0])
def test_lobe_width_matches_the_vqt_response_to_a_sinusoid(freq):
    # librosa's VQT is the reference: a steady sinusoid's spectral peak has the width our lobe assumes
    t = np.arange(2 * SR) / SR
    spec = compute_spectrogram(np.sin(2 * np.pi * freq * t).astype(np.float32), SR, tuning=0.0)
    col = spec.V[:, spec.n_frames // 2]
    b = int(np.argmax(col))
    d = harmonic_dictionary(spec, instrument="flute" if freq > 200 else "cello")
    midi = int(round(69 + 12 * np.log2(freq / 440)))
    lobe = d.lobes[:, list(d.pitches).index(midi), 0]
    measured = col[b - 2: b + 3] / col[b]
    model = lobe[b - 2: b + 3] / lobe[b]
    np.testing.assert_allclose(model, measured, atol=0.15)


def test_columns_sum_to_one_and_are_float32():
    d = harmonic_dictionary(_axis(), instrument="piano")
    assert d.W.dtype == np.float32
    np.testing.assert_allclose(d.W.sum(axis=0), 1.0, rtol=1e-5)
    assert list(d.pitches) == list(range(21, 109))


def test_adaptation_keeps_templates_harmonic_and_lowers_the_cost():
    spec = _axis()
    d = harmonic_dictionary(spec, instrument="clarinet")
    rng = np.random.default_rng(0)
    # a "true" instrument with other partial amplitudes on the same lobes
    true = d.with_amplitudes(d.partial_amplitudes * rng.uniform(0.2, 2.0, d.partial_amplitudes.shape))
    H_true = rng.random((d.n_pitches, 60)) * (rng.random((d.n_pitches, 60)) > 0.8)
    V = true.W @ H_true
    H = decompose(V, d.W, n_iter=100).H
    before = decompose(V, d.W, n_iter=100).costs[-1]
    adapted = adapt_dictionary(V, d, H, n_iter=30)
    after = decompose(V, adapted.W, n_iter=100, H_init=H).costs[-1]
    assert after < before
    assert np.all(adapted.W[d.W == 0] == 0)  # zeros stay zero: templates stay harmonic
    assert adapted.adapted


def test_save_and_load_round_trip(tmp_path):
    spec = _axis()
    d = harmonic_dictionary(spec, instrument="cello")
    d2 = d.with_amplitudes(d.partial_amplitudes * 1.5)
    path = save_dictionary(d2, tmp_path / "cello.npz")
    loaded = load_dictionary(path)
    np.testing.assert_allclose(loaded.W, d2.W, rtol=1e-5, atol=1e-7)
    assert loaded.instrument == "cello" and loaded.program == 42
    with pytest.raises(OutputError, match="already exists"):
        save_dictionary(d2, path)


def test_load_refuses_other_files(tmp_path):
    bad = tmp_path / "x.npz"
    bad.write_bytes(b"not a numpy file")
    with pytest.raises(DictionaryError, match="not a takescribe dictionary"):
        load_dictionary(bad)
    with pytest.raises(DictionaryError, match="not found"):
        load_dictionary(tmp_path / "missing.npz")
