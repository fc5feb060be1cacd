# Writes tests/data/cut-table-v1.cuts (run from the repo root). Kept for the record: the
# golden file must keep decoding as it is; never regenerate it for a newer format.
import numpy as np
from sketchmerge import Summary
from sketchmerge.cuts import feature_cuts, encode_table
x = np.where(np.arange(100) % 10 == 6, np.nan, np.arange(100) * 1.5)
w = np.linspace(0.5, 2.0, x.size)
s = Summary.from_values(x, w)
f1 = feature_cuts("spread", s.prune(40), 4, 1 / 32)
f2 = feature_cuts("levels", Summary.from_values(np.array([1, 2, 2, 3] * 5, dtype=np.int16)), 4, 1 / 32)
content = {"source": "file:///data/golden", "options": {"bins": 4, "rank_error": 1 / 32}, "rows": 100,
           "root": "0" * 64, "skipped": [{"column": "note", "type": "string", "reason": "non-numeric type"}],
           "units": {"address": ["day=1/a.parquet#rg=0-0"], "fingerprint": ["ab" * 32], "rows": [100], "nbytes": [4096]}}
rec = {"created": "2026-12-01T00:00:00Z", "tool": "sketchmerge 0.1.0", "previous_version": None,
       "changes": {"units_added": 1, "units_removed": 0, "units_changed": 0}}
open("tests/data/cut-table-v1.cuts", "wb").write(encode_table([f1, f2], version=1, content_extra=content, record=rec))
print(f1.edges, f1.first_target, f1.last_target, f1.rank_error, f2.edges)
