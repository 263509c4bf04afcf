"""Coefficient export: the C99 header compiles and filters exactly like the Equalizer."""

from __future__ import annotations

import shutil
import subprocess

import numpy as np
import pytest

import dspeq
from dspeq.export import c_identifier, design_to_c, design_to_csv

CC = shutil.which("cc") or shutil.which("gcc")

_MAIN = r"""
#include <stdio.h>
#include <stdlib.h>
#include "{header}"

int main(void)
{{
    size_t n = 0, ch = {channels};
    static double buf[1 << 16];
    while (n < sizeof buf / sizeof buf[0] && scanf("%lf", &buf[n]) == 1) ++n;
    {prefix}_state st[{channels}];
    for (size_t c = 0; c < ch; ++c) {{
        {prefix}_reset(&st[c]);
        /* two calls per channel: the state must carry across blocks */
        size_t frames = n / ch, half = frames / 3;
        {prefix}_process(&st[c], buf + c, buf + c, half, ch);
        {prefix}_process(&st[c], buf + c + half * ch, buf + c + half * ch, frames - half, ch);
    }}
    for (size_t i = 0; i < n; ++i) printf("%.17g\n", buf[i]);
    return 0;
}}
"""


@pytest.mark.skipif(CC is None, reason="no C compiler on this machine")
@pytest.mark.parametrize("name,fs,method", [("riaa", 48000, "matched-z"),
                                            ("iec-7.5ips", 44100, "closed-form"),
                                            ("riaa-iec", 96000, "bilinear")])
def test_c_header_compiles_and_matches_equalizer(tmp_path, name, fs, method):
    d = dspeq.design(name, fs, method=method)
    prefix = c_identifier(f"t_{name}")
    (tmp_path / "eq.h").write_text(design_to_c(d, prefix))
    (tmp_path / "main.c").write_text(_MAIN.format(header="eq.h", prefix=prefix, channels=2))
    exe = tmp_path / "eq"
    subprocess.run([CC, "-std=c99", "-O2", "-Wall", "-Wextra", "-Werror", "-o", str(exe),
                    str(tmp_path / "main.c")], check=True, capture_output=True)
    x = np.random.default_rng(7).uniform(-1, 1, (3000, 2))
    res = subprocess.run([str(exe)], input="\n".join(f"{v:.17g}" for v in x.ravel()),
                         capture_output=True, text=True, check=True)
    y_c = np.array(res.stdout.split(), dtype=float).reshape(x.shape)
    y_eq = dspeq.Equalizer(d, channels=2).process(x)
    # Same recursion, same coefficients (printed with 17 digits, exact round trip), no -ffast-math:
    # identical up to the compiler's freedom to contract a*b+c into one FMA (≤ a few ulp).
    np.testing.assert_allclose(y_c, y_eq, rtol=1e-12, atol=1e-15)


def test_c_identifier():
    assert c_identifier("nab-7.5ips") == "nab_7_5ips"
    assert c_identifier("1/s") == "c_1_s"


def test_csv_round_trips_coefficients():
    d = dspeq.design("riaa", 44100, method="matched-z")
    rows = design_to_csv(d).strip().splitlines()[1:]
    np.testing.assert_array_equal(np.array([[float(v) for v in r.split(",")] for r in rows]), d.sos)
