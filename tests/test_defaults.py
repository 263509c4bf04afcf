"""Shared defaults do not drift between the API, the CLI, the batch options and verify."""

from __future__ import annotations

import inspect

import dspeq
from dspeq.batch.job import DEFAULT_BLOCK_FRAMES, Settings
from dspeq.cli import build_parser
from dspeq.design import DEFAULT_LF_LIMIT_HZ, DEFAULT_METHOD, design
from dspeq.spec import curve
from dspeq.verify import VERIFY_BLOCK_FRAMES, verify


def _sub(name):
    parser = build_parser()
    action = next(a for a in parser._actions if a.dest == "command")
    return action.choices[name]


def _default(sub, dest):
    return next(a.default for a in sub._actions if a.dest == dest)


def test_design_defaults_agree_everywhere():
    sig = inspect.signature(design)
    assert sig.parameters["method"].default == DEFAULT_METHOD == Settings().method
    assert sig.parameters["lf_limit_hz"].default == DEFAULT_LF_LIMIT_HZ == Settings().lf_limit_hz
    assert _default(_sub("check"), "method") == DEFAULT_METHOD
    # CLI --lf-limit defaults to None, meaning the design default
    assert _default(_sub("check"), "lf_limit") is None


def test_curve_defaults_agree():
    sig = inspect.signature(curve)
    assert sig.parameters["speed"].default == Settings().speed == _default(_sub("check"), "speed")
    assert sig.parameters["reference_hz"].default is None is Settings().reference_hz


def test_verify_streams_like_the_batch():
    assert VERIFY_BLOCK_FRAMES == DEFAULT_BLOCK_FRAMES
    assert inspect.signature(verify).parameters["block_frames"].default == DEFAULT_BLOCK_FRAMES


def test_public_api_is_complete():
    for name in dspeq.__all__:
        assert getattr(dspeq, name) is not None
