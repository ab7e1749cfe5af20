# Type stub of the optional compiled generator kernel (generator_kernel.c).
from collections.abc import Sequence

def init(
    series: Sequence[float],
    ln2_hi: float,
    ln2_lo: float,
    mass: float,
    bound: float,
    use_wide: bool,
    /,
) -> str: ...
def raw(k0: int, k1: int, stream: int, start: int, out: object, /) -> None: ...
def fill(
    dist: int, k0: int, k1: int, stream: int, start: int, scale: float, out: object, /
) -> bool: ...
