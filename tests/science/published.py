"""Comparing with published numbers, which carry only the digits their source printed."""

from __future__ import annotations

import pytest


def printed(value: str):
    """pytest.approx to half a unit of the last printed digit of a published number."""
    mantissa, _, exponent = value.lower().partition("e")
    decimals = len(mantissa.partition(".")[2])
    scale = 10.0 ** int(exponent or 0)
    return pytest.approx(float(value), abs=0.5 * 10.0**-decimals * scale * (1 + 1e-9))
