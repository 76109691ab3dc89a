"""Tests of voxelscope.core.errors: one line, structured fields, remedies by front end."""

from __future__ import annotations

import pickle

from voxelscope.cli.remedies import CLI_REMEDIES
from voxelscope.core.errors import REMEDIES, InputError, OutputExistsError


def test_every_front_end_remedy_is_a_core_remedy():
    """The command line phrases only remedies the core names (a typo would never show)."""
    assert set(CLI_REMEDIES) <= set(REMEDIES)


def test_plain_words_name_no_flag_and_the_command_line_adds_it():
    err = InputError("run.nii: no usable TR", file="run.nii", field="TR", remedy="tr")
    assert str(err) == "run.nii: no usable TR; give the TR in seconds" and "--" not in str(err)
    assert err.phrase(CLI_REMEDIES) == "run.nii: no usable TR; give the TR in seconds (--tr)"
    assert InputError("plain").phrase(CLI_REMEDIES) == "plain"


def test_fields_survive_pickling():
    """Errors cross process boundaries (background workers) with their fields."""
    for err in (InputError("x: bad", file="x", field="f", value=3, remedy="tr"),
                OutputExistsError("/o/a.png")):  # fmt: skip
        back = pickle.loads(pickle.dumps(err))
        assert type(back) is type(err) and str(back) == str(err)
        assert (back.file, back.field, back.value, back.remedy) == (
            err.file, err.field, err.value, err.remedy,
        )  # fmt: skip
    assert pickle.loads(pickle.dumps(OutputExistsError("/o/a.png"))).path == "/o/a.png"
