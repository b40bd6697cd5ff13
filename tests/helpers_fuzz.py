"""Hypothesis strategies for malformed input, and the check every loader must pass under them.

For the preference-pair data loader (issue 6), a test in the same spirit as tests/test_fuzz.py::
    @FUZZ
    @given(blob=junk_bytes)
    def test_pairs_file_of_any_bytes(tmp_path, blob):
        path = tmp_path / "pairs.jsonl"
        path.write_bytes(blob)
        pairs = assert_loads_or_one_line_error(load_pairs, path)
        # row accounting: rows read == rows kept + rows reported as dropped, and nothing silently lost

``jsonl_lines`` gives files of JSON lines mixing good rows with broken ones.
"""

from __future__ import annotations

import json

from hypothesis import HealthCheck, settings
from hypothesis import strategies as st

# bounded so that the suite stays fast; no example database written into the worktree
FUZZ = settings(max_examples=60, deadline=None, database=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture])

scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**30, 10**30), st.floats(allow_nan=True),
                    st.text(max_size=8))
json_values = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=5),
    st.dictionaries(st.sampled_from(["reference", "preference", "rewards", "sampling", "responses", "prompts",
                                     "prompt", "weight", "description", "_target_", "x"]), inner, max_size=5)),
    max_leaves=30)
junk_bytes = st.one_of(st.binary(max_size=200),
                       json_values.map(lambda v: json.dumps(v).encode()),
                       st.sampled_from([b"[" * 5000, b'{"reference": ' + b"[" * 3000 + b"]" * 3000 + b"}",
                                        b'{"reference": [1e400, 0]}', b'{"reference": [NaN, 1]}',
                                        b'{"reference": [0.5, 0.5], "rewards": [10' + b"0" * 400 + b', 1]}',
                                        b"\xef\xbb\xbf{}", b"", b"null"]))


good_row = st.fixed_dictionaries({"prompt": st.text(max_size=10), "winner": st.text(max_size=10),
                                   "loser": st.text(max_size=10)})
jsonl_lines = st.lists(st.one_of(good_row.map(json.dumps), json_values.map(json.dumps), st.text(max_size=20)),
                       max_size=12).map(lambda lines: "\n".join(lines).encode())


def assert_loads_or_one_line_error(load, arg):
    """``load(arg)`` returns, or raises ValueError whose message is one non-empty line."""
    try:
        return load(arg)
    except ValueError as err:
        message = str(err)
        assert message and "\n" not in message, repr(message)
        return None


