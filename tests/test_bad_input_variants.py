"""Held-out variants of the bad-input catalogue's issue-25 cases (tests/test_bad_input.py).

A red-team pass tried each case of the catalogue again in another form (another spelling of
a path, another phase, another kind of file); each variant that failed is kept here: the exit
code, the one line, what is left on disk and that nothing outside the output folder changed.
"""

from __future__ import annotations

import pytest

from .conftest import smooth_terrain, write_tif
from .test_bad_input import RUN, no_traceback, one_line_error, outputs_of, outside, tree  # noqa: F401


@pytest.fixture
def dem(tmp_path):
    return write_tif(tmp_path / "dem.tif", smooth_terrain((40, 40), seed=1))


# -- 3. inputs are sacred: the files kept beside a checkpoint ------------------------------------------
@pytest.mark.parametrize("name", [".ck.npz.lock", ".ck.npz.abcd1234.part", ".ck.npz.abcd1234.part.npz"])
def test_an_input_at_a_name_the_checkpoint_uses_is_refused(cairn, tmp_path, name):
    # the checkpoint's lock file is truncated and removed, its temporary names are swept
    proj = tmp_path / "proj"
    proj.mkdir()
    dem = write_tif(proj / name, smooth_terrain((40, 40), seed=1))
    before = tree(tmp_path)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--checkpoint", proj / "ck.npz")
    one_line_error(code, err, name, "input", "beside the checkpoint", "--checkpoint")
    assert tree(tmp_path) == before


@pytest.mark.parametrize("where", [".ck.abcd1234.part", ".cairn-staging-mine/ck.npz", ".cairn.lock",
                                   "summits.csv"])
@pytest.mark.parametrize("resume", [False, pytest.param(True, marks=pytest.mark.slow)])
def test_a_checkpoint_where_the_tidy_up_or_publication_would_remove_it(cairn, dem, tmp_path, where,
                                                                      resume):
    out = tmp_path / "o"
    ck = out / where
    if resume:  # a checkpoint of hours of work, made with another output folder
        ck.parent.mkdir(parents=True)
        assert cairn("peaks", dem, "-o", tmp_path / "first", *RUN, "--checkpoint", ck)[0] == 0
    before = tree(tmp_path)
    code, _, err = cairn("peaks", dem, "-o", out, *RUN, "--checkpoint", ck,
                         *(("--resume", "-n", "6") if resume else ()))
    one_line_error(code, err, str(ck), "--checkpoint")
    assert tree(tmp_path) == before  # the checkpoint is still there, nothing was tidied
