"""Catalog shapes shared by an op family; each op's module picks its CatalogShapes from these.

Channel ops (batch, group, instance norm) write shapes channels first as (shape, groups), the
groups used by group norm only; layer and RMS norm write (shape, norm_ndim).
"""

from __future__ import annotations

from .spec import CatalogShapes

__all__ = ["LONG", "LONG_PARAMS", "channel_shapes", "feature_shapes"]

#: Elements per statistic of the standard tier's long reductions.
LONG = 1 << 20

CHANNEL_SMOKE = (((4, 6, 5, 5), 3), ((3, 8), 2))
#: Edge, odd/prime, typical, ranks 2..5.
CHANNEL_STANDARD = (
    ((1, 6, 7, 7), 3),        # batch of 1
    ((5, 6, 1, 1), 2),        # 1x1 spatial
    ((3, 7, 11), 7),          # odd and prime sizes, rank 3
    ((2, 10, 13, 3, 5), 5),   # rank 5
    ((16, 4), 2),             # rank 2
    ((8, 32, 14, 14), 8),     # typical convolution activation
    ((1, 6, 1, 1), 6),        # one element per group for group/instance norm
    ((33, 12, 9, 9), 4),
)
CHANNEL_EXHAUSTIVE = (((2, 64, 28, 28), 32), ((7, 3, 17, 19), 3), ((4, 16, 8, 8, 8), 4), ((64, 1024), 32))

FEATURE_SMOKE = (((4, 64), 1), ((2, 3, 16), 1))
FEATURE_STANDARD = (
    ((6, 1), 1),              # one element per row
    ((1, 257), 1),            # batch of 1, prime length
    ((7, 13), 1),
    ((2, 5, 6), 2),           # two normalized axes
    ((2, 3, 4, 10), 1),       # rank 4
    ((2, 2, 3, 4, 5), 3),     # rank 5
    ((8, 128, 768), 1),       # transformer activation
    ((6, 4096), 1),
    ((3, 999), 1),            # length not a multiple of 8
)
FEATURE_EXHAUSTIVE = (((32, 4096), 1), ((4, 7, 9, 11), 2), ((1, 50257), 1))


#: Terms per dweight/dbias sum of the constant-gradient case: 2^17, above float16's largest value
#: 65504 (IEEE 754-2019 binary16), so that dbias = sum(dy = 1) overflows a float16 accumulator.
LONG_PARAMS = 1 << 17
#: Channel ops: N * spatial = 2^17 terms per channel (one channel per group for group norm).
CHANNEL_LONG_PARAMS = ((2, 2, 256, 256), 2)
#: Layer and RMS norm: 2^17 rows of 4 features.
FEATURE_LONG_PARAMS = ((LONG_PARAMS, 4), 1)


def channel_shapes(long: tuple[tuple[int, ...], int], extra: tuple = ()) -> CatalogShapes:
    """The channel ops' shapes; ``long`` has 2^20 elements per statistic of the op; ``extra``
    standard shapes only one op has (appended after the shared ones)."""
    return CatalogShapes(smoke=CHANNEL_SMOKE, standard=CHANNEL_STANDARD + tuple(extra),
                         exhaustive=CHANNEL_EXHAUSTIVE, mid=((4, 8, 6, 5), 4),
                         long_cancellation=((8, 16, 12, 12), 4, "channels_last"), long=long,
                         long_params=CHANNEL_LONG_PARAMS)


def feature_shapes() -> CatalogShapes:
    """Layer and RMS norm's shapes."""
    return CatalogShapes(smoke=FEATURE_SMOKE, standard=FEATURE_STANDARD, exhaustive=FEATURE_EXHAUSTIVE,
                         mid=((12, 96), 1), long_cancellation=((4, 2048), 1, "trailing"), long=((2, LONG), 1),
                         long_params=FEATURE_LONG_PARAMS)
