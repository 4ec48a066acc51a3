"""textfiles and batches: the shared readers and padding the torch-free predict path relies on."""
import io
import subprocess
import sys

import numpy as np
import pytest

from shrinkwrap.serve.batches import all_outputs, collate
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.textfiles import byte_to_line, utf8_lines


def test_utf8_lines_names_the_line_and_copies_what_it_read():
    copy = io.BytesIO()
    lines = utf8_lines(io.BytesIO(b"one\ntwo\nth\xffree\n"), "x.txt", copy)
    assert next(lines) == (1, "one\n") and next(lines) == (2, "two\n")
    with pytest.raises(UserError, match=r"x.txt: not UTF-8 text — line 3, byte 3 of the line \(0xff\)"):
        next(lines)
    assert copy.getvalue() == b"one\ntwo\nth\xffree\n"


def test_byte_to_line_counts_newlines_before_the_offset(tmp_path):
    path = tmp_path / "t.txt"
    path.write_bytes(b"ab\ncd\nef")
    # Reference: by hand, byte 7 ('f') is on the third line.
    assert byte_to_line(path, 7) == "line 3 (byte 7)"


def test_all_logits_returns_rows_in_the_examples_order_whatever_the_length_sort():
    examples = [{"input_ids": [5] * n, "attention_mask": [1] * n} for n in (3, 1, 2)]
    # Each row's "logit" is its own unpadded length (the mask's sum), so the order is checkable by hand.
    out = all_outputs(lambda b: b["attention_mask"].sum(1, keepdims=True), examples, pad_id=0, width=1,
                     batch_size=2)
    assert out[:, 0].tolist() == [3, 1, 2]
    batch = collate(examples, pad_id=9)
    assert batch["input_ids"].tolist() == [[5, 5, 5], [5, 9, 9], [5, 5, 9]]
    assert batch["input_ids"].dtype == np.int64


def test_shared_modules_import_only_numpy_and_the_standard_library():
    code = ("import sys; import shrinkwrap.serve.batches, shrinkwrap.serve.textfiles; "
            "print(sorted(m for m in ('torch', 'transformers', 'pandas', 'scipy', 'sklearn') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
