"""The one check before writing a new file: never over an existing one, never into a missing folder."""

from __future__ import annotations

import pytest

from lightloom.sequencer.errors import UsageError
from lightloom.sequencer.outputs import check_new_output


def test_an_existing_output_is_refused_with_the_callers_words(tmp_path):
    out = tmp_path / "night.h5"
    out.write_text("")
    with pytest.raises(UsageError, match="night.h5 exists already") as refused:
        check_new_output(out, "--out", f"{out} exists already")
    assert refused.value.exit_status == 2


def test_an_output_in_a_missing_folder_names_the_folder_and_the_option(tmp_path):
    with pytest.raises(UsageError, match=r"the folder .*nowhere does not exist; create it or choose another --skeleton"):
        check_new_output(tmp_path / "nowhere" / "bench.yaml", "--skeleton", "exists")


def test_a_new_file_in_an_existing_folder_passes(tmp_path):
    check_new_output(tmp_path / "new.yaml", "--out", "exists")
