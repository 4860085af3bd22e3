"""File sizes for people (index.api.size_text): decimal SI prefixes, one decimal, rounded half up."""
from __future__ import annotations

import pytest

from index.api import size_text


@pytest.mark.parametrize("size, text", [
    (None, ""), (0, "0 bytes"), (1, "1 byte"), (999, "999 bytes"),
    (1000, "1.0 kB"),  # SI prefix kilo = 10^3, symbol lower-case k (BIPM, The SI Brochure, 9th ed., table 7)
    (39_110, "39.1 kB"), (1049, "1.0 kB"), (1050, "1.1 kB"), (1250, "1.3 kB"),  # half up, not half even
    (999_949, "999.9 kB"), (999_950, "1.0 MB"),  # never "1000.0 kB"
    (2_400_000, "2.4 MB"), (10**9, "1.0 GB"), (5 * 10**12, "5.0 TB"), (5 * 10**15, "5000.0 TB"),
])
def test_size_text(size, text):
    assert size_text(size) == text
