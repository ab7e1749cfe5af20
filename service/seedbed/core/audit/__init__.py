"""Audit of existing weights: read an uploaded NPZ or safetensors file safely (never
unpickling, sizes checked before anything is decompressed) and report, per tensor, its
statistics, twin units, numerical rank and non-finite values, and, given the request that
describes the network, its scale against the recommended one.

Layout: the readers live next to the writers, in seedbed.formats: upload_in.py recognises the
file and dispatches to npz_in.py / safetensors_in.py (every refusal happens there, as
UploadRefused, before any value is read); multipart_in.py parses multipart/form-data uploads
incrementally. Here: stats.py, identical_units.py and rank.py analyse one tensor; matching.py
compares with a plan; report.py assembles findings (findings.py) and the summary.
"""

from seedbed.core.audit.findings import Finding
from seedbed.core.audit.limits import AuditLimits
from seedbed.core.audit.refusals import UploadRefused
from seedbed.core.audit.report import NOTICE, audit_stored

__all__ = [
    "NOTICE",
    "AuditLimits",
    "Finding",
    "UploadRefused",
    "audit_stored",
]
