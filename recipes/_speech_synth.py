"""Synthetic speech for the ``speech`` recipe: eSpeak NG driven through ctypes.

The ``espeakng-loader`` wheel ships the eSpeak NG shared library and its
data folder; nothing is installed on the system and nothing is downloaded.
The engine runs in synchronous mode and hands its 22.05 kHz int16 samples to
a callback; we resample them to 16 kHz with scipy's polyphase resampler.

Speaker variety comes from the engine itself: English accents, its voice
variants (``m1`` .. ``m7``, ``f1`` .. ``f5``: formant, pitch and voicing
settings), and per-utterance pitch, pitch range and speaking rate. Held-out
utterances use sentences *and* voice variants that training never sees.

Determinism: eSpeak NG keeps internal state from one utterance to the next
(measured: the same sentence rendered twice in one process gives different
waveforms, even with its random seed reset). A fresh process that renders
the same list in the same order gives identical samples (measured: four
processes, identical hashes). So every list of utterances is rendered in a
fresh worker process (a plain subprocess, one per chunk of utterances), with the
engine's and the C library's random seeds set before each utterance.
"""

from __future__ import annotations

import ctypes
import dataclasses
import io
import json
import os
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

RATE = 16_000  # what the recipe works at
ENGINE_RATE = 22_050  # what eSpeak NG produces
SENTENCE_FILE = Path(__file__).with_name("speech_sentences.txt")
_ROOT = Path(__file__).resolve().parents[1]  # the folder holding the recipes package

# Voices of the engine (files under espeak-ng-data/lang and espeak-ng-data/voices/!v).
ACCENTS = ("en", "en-us", "en-gb-scotland", "en-gb-x-rp", "en-029")
TRAIN_VARIANTS = ("m1", "m2", "m3", "m4", "m5", "m6", "f1", "f2", "f3", "f5")
HELD_OUT_VARIANTS = ("m7", "f4")
HELD_OUT_EVERY = 10  # sentence i is held out when i % 10 == 9
_CHUNK = 96  # utterances rendered per fresh process

# eSpeak NG C interface (speak_lib.h): enum values we use.
_OUTPUT_SYNCHRONOUS = 2
_POS_CHARACTER = 1
_CHARS_UTF8 = 1
_RATE, _PITCH, _RANGE = 1, 3, 4


@dataclass(frozen=True)
class Utterance:
    """One sentence spoken by one voice: what eSpeak NG is asked to say."""

    sentence: int  # index into :func:`sentences`
    voice: str  # accent and variant, for example "en-us+m3"
    pitch: int  # base pitch, 0-100 (engine default 50)
    pitch_range: int  # intonation range, 0-100 (engine default 50)
    words_per_minute: int  # speaking rate (engine default 175)


def sentences() -> list[str]:
    """The bundled sentences (our own, for this project), in file order."""
    lines = SENTENCE_FILE.read_text(encoding="utf-8").splitlines()
    return [s.strip() for s in lines if s.strip() and not s.startswith("#")]


def sentence_split(count: int) -> tuple[list[int], list[int]]:
    """Indices of the training and held-out sentences among ``count``."""
    held = [i for i in range(count) if i % HELD_OUT_EVERY == HELD_OUT_EVERY - 1]
    return [i for i in range(count) if i % HELD_OUT_EVERY != HELD_OUT_EVERY - 1], held


def draw_utterances(seed: int, held_out: bool, count: int) -> list[Utterance]:
    """``count`` utterances of the training (or held-out) sentences and voices, drawn from ``seed``.

    Training: every training sentence in a seeded order, repeated with new
    voices until ``count``. Held-out: the held-out sentences in order, each
    with a held-out variant.

    >>> a = draw_utterances(0, False, 5)
    >>> a == draw_utterances(0, False, 5), a == draw_utterances(1, False, 5)
    (True, False)
    """
    train, held = sentence_split(len(sentences()))
    rng = np.random.default_rng([seed, 7001, int(held_out)])
    pool = held if held_out else train
    variants = HELD_OUT_VARIANTS if held_out else TRAIN_VARIANTS
    out = []
    order: list[int] = []
    for i in range(count):
        if not order:
            order = list(pool) if held_out else list(rng.permutation(pool))
        out.append(
            Utterance(
                sentence=int(order.pop(0)),
                voice=f"{ACCENTS[rng.integers(len(ACCENTS))]}+{variants[i % len(variants) if held_out else rng.integers(len(variants))]}",
                pitch=int(rng.integers(25, 76)),
                pitch_range=int(rng.integers(30, 91)),
                words_per_minute=int(rng.integers(140, 211)),
            )
        )
    return out


def synthesise(utterances: list[Utterance]) -> list[np.ndarray]:
    """Render each utterance as float32 ``[samples]`` at 16 kHz in about [-1, 1].

    Runs in fresh worker processes (see the module docstring), at most two at
    once, so the result does not depend on what was rendered before.
    """
    chunks = [utterances[i : i + _CHUNK] for i in range(0, len(utterances), _CHUNK)]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(_ROOT), os.environ.get("PYTHONPATH", "")]))
    command = [sys.executable, "-c", "from recipes._speech_synth import _worker; _worker()"]
    out: list[np.ndarray] = []
    for pair in range(0, len(chunks), 2):
        running = []
        for chunk in chunks[pair : pair + 2]:
            proc = subprocess.Popen(
                command, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env
            )
            request = json.dumps([dataclasses.astuple(u) for u in chunk]).encode()
            running.append((proc, request))
        for proc, request in running:
            stdout, stderr = proc.communicate(request)
            if proc.returncode != 0:
                raise RuntimeError(f"speech synthesis failed: {stderr.decode(errors='replace').strip()[-400:]}")
            with np.load(io.BytesIO(stdout), allow_pickle=False) as arrays:
                samples, lengths = arrays["samples"], arrays["lengths"]
            out += np.split(samples, np.cumsum(lengths)[:-1])
    return out


def _worker() -> None:
    """Worker process: utterances as JSON on stdin, an ``.npz`` (samples, lengths) on stdout."""
    utterances = [Utterance(*u) for u in json.loads(sys.stdin.buffer.read())]
    clips = _render_chunk(utterances)
    buffer = io.BytesIO()
    np.savez(buffer, samples=np.concatenate(clips), lengths=np.array([len(c) for c in clips], np.int64))
    sys.stdout.buffer.write(buffer.getvalue())
    sys.stdout.buffer.flush()


# ------------------------------------------------------- engine (one process)
_CALLBACK = ctypes.CFUNCTYPE(ctypes.c_int, ctypes.POINTER(ctypes.c_short), ctypes.c_int, ctypes.c_void_p)


class _Engine:
    """eSpeak NG loaded from the wheel, in synchronous mode; one per process."""

    def __init__(self) -> None:
        import espeakng_loader

        lib = ctypes.CDLL(espeakng_loader.get_library_path())
        lib.espeak_Initialize.argtypes = [ctypes.c_int, ctypes.c_int, ctypes.c_char_p, ctypes.c_int]
        lib.espeak_Initialize.restype = ctypes.c_int
        lib.espeak_SetVoiceByName.argtypes = [ctypes.c_char_p]
        lib.espeak_SetParameter.argtypes = [ctypes.c_int, ctypes.c_int, ctypes.c_int]
        lib.espeak_ng_SetRandSeed.argtypes = [ctypes.c_long]
        lib.espeak_Synth.argtypes = [
            ctypes.c_void_p,
            ctypes.c_size_t,
            ctypes.c_uint,
            ctypes.c_int,
            ctypes.c_uint,
            ctypes.c_uint,
            ctypes.c_void_p,
            ctypes.c_void_p,
        ]
        rate = lib.espeak_Initialize(_OUTPUT_SYNCHRONOUS, 0, espeakng_loader.get_data_path().encode(), 0)
        if rate != ENGINE_RATE:
            raise RuntimeError(f"eSpeak NG started at {rate} Hz, expected {ENGINE_RATE} Hz")
        self._pieces: list[np.ndarray] = []
        self._callback = _CALLBACK(self._collect)  # kept alive as long as the engine
        lib.espeak_SetSynthCallback(self._callback)
        self._lib = lib
        self._libc = ctypes.CDLL(None)

    def _collect(self, wav, count: int, events) -> int:
        if count > 0 and wav:
            self._pieces.append(np.ctypeslib.as_array(wav, shape=(count,)).copy())
        return 0  # 0: go on synthesising

    def say(self, text: str, u: Utterance, seed: int) -> np.ndarray:
        """int16 samples at 22.05 kHz."""
        lib = self._lib
        if lib.espeak_SetVoiceByName(u.voice.encode()) != 0:
            raise RuntimeError(f"eSpeak NG has no voice {u.voice!r}")
        lib.espeak_SetParameter(_RATE, u.words_per_minute, 0)
        lib.espeak_SetParameter(_PITCH, u.pitch, 0)
        lib.espeak_SetParameter(_RANGE, u.pitch_range, 0)
        lib.espeak_ng_SetRandSeed(seed)
        self._libc.srand(seed)
        self._pieces = []
        data = text.encode("utf-8") + b"\0"
        status = lib.espeak_Synth(data, len(data), 0, _POS_CHARACTER, 0, _CHARS_UTF8, None, None)
        lib.espeak_Synchronize()
        if status != 0:
            raise RuntimeError(f"eSpeak NG failed ({status}) on sentence {u.sentence}")
        return np.concatenate(self._pieces) if self._pieces else np.zeros(0, np.int16)


def _render_chunk(utterances: list[Utterance]) -> list[np.ndarray]:
    from scipy.signal import resample_poly

    engine = _Engine()
    text = sentences()
    out = []
    for u in utterances:
        pcm = engine.say(text[u.sentence], u, seed=u.sentence)
        # 22050 -> 16000 Hz is 320/441; resample_poly low-passes with a Kaiser-windowed FIR.
        out.append(resample_poly(pcm.astype(np.float64) / 32768.0, 320, 441).astype(np.float32))
    return out
