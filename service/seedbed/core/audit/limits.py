"""How much an audit may read and compute, and why each default is what it is."""

from __future__ import annotations

from dataclasses import dataclass, fields

MIB = 1 << 20


@dataclass(frozen=True)
class AuditLimits:
    """Bounds on one audit. The web layer builds one from its settings; tests pass their own.

    - max_upload_bytes = 256 MiB: bounds the uploaded file AND the bytes unpacked from it (the
      sum of the NPZ members' declared sizes), because every tensor is held in memory while it
      is analysed. 256 MiB is 64 million float32 values: the starting point of models up to
      that size; larger checkpoints can be split and audited in parts.
    - max_tensors = 20000: far more tensors than any network described by layers has, while
      keeping the per-tensor bookkeeping of one request to a fraction of a second.
    - max_header_bytes = 16 MiB: a safetensors header (or a seedbed NPZ manifest member) is
      JSON that is parsed whole; 20000 entries need well under 4 MiB.
    - max_npy_header_bytes = 65536: an NPY header is a short Python literal; numpy itself
      refuses headers above 10000 bytes by default. The literal is parsed safely (no code runs).
    - rank_full_work = 2**25: a singular value decomposition of an m x n matrix costs about
      m * n * min(m, n) operations; up to 256 x 512 x 256 the whole matrix is decomposed,
      beyond that a seeded sample of at most rank_sample_short x rank_sample_long is.
    - rank_budget = 2**31: total SVD work per audit (about 64 full-size samples); tensors after
      the budget is spent get a note instead of a rank.
    - shown_groups / shown_members: twin groups listed per tensor and unit indices per group;
      the counts are always complete.
    """

    max_upload_bytes: int = 256 * MIB
    max_tensors: int = 20000
    max_header_bytes: int = 16 * MIB
    max_npy_header_bytes: int = 65536
    rank_full_work: int = 1 << 25
    rank_sample_short: int = 256
    rank_sample_long: int = 512
    rank_budget: int = 1 << 31
    shown_groups: int = 10
    shown_members: int = 16

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"AuditLimits.{f.name} must be a positive integer, got {value!r}")
