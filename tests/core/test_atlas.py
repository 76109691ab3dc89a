"""Region names from a BIDS segmentation image and its label table (issue 17 item 6)."""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from nibabel.affines import apply_affine

from voxelscope.core.atlas import Atlas, find_label_table, load_atlas, read_label_table
from voxelscope.core.errors import InputError

TABLE = "index\tname\tabbreviation\n1\thand area\tH\n2\thearing area\tA\n7\tedge\tE\n"


def _oblique_affine() -> np.ndarray:
    """A non-identity grid: axes permuted and flipped (P-I-R order), 2.5/2/3 mm, rotated
    10 degrees about z, off-centre origin."""
    perm = np.array([[0.0, 0.0, 3.0], [-2.5, 0.0, 0.0], [0.0, -2.0, 0.0]])
    c, s = np.cos(np.radians(10)), np.sin(np.radians(10))
    rot = np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])
    aff = np.eye(4)
    aff[:3, :3] = rot @ perm
    aff[:3, 3] = (-20.0, 31.0, 18.0)
    return aff


def _write_atlas(folder: Path, name="sub-01_space-X_atlas-demo_dseg.nii.gz", table=TABLE):
    rng = np.random.default_rng(3)
    labels = rng.choice([0, 1, 2, 7], size=(11, 9, 8)).astype(np.int16)
    path = folder / name
    nib.save(nib.Nifti1Image(labels, _oblique_affine()), path)
    if table is not None:
        (folder / name.replace(".nii.gz", ".tsv")).write_text(table)
    return path, labels


def test_lookup_matches_nibabel_apply_affine_on_an_oblique_grid(tmp_path):
    """Nearest-neighbour lookup through the affines: the atlas voxel is
    round(apply_affine(inv(A), mm)) (nibabel.affines.apply_affine as the reference)."""
    path, labels = _write_atlas(tmp_path)
    atlas = load_atlas(path)
    assert nib.aff2axcodes(atlas.affine) != ("R", "A", "S")
    inv = np.linalg.inv(nib.load(path).affine)
    rng = np.random.default_rng(8)
    names = {0: None, 1: "hand area", 2: "hearing area", 7: "edge"}
    inside = outside = 0
    corners = apply_affine(
        nib.load(path).affine, np.array(np.meshgrid([0, 10], [0, 8], [0, 7])).reshape(3, -1).T
    )
    lo, hi = corners.min(0) - 8, corners.max(0) + 8  # the grid's box and a margin around it
    for mm in rng.uniform(lo, hi, size=(600, 3)):
        ijk = np.floor(apply_affine(inv, mm) + 0.5).astype(int)
        region = atlas.region_at(mm)
        if np.any(ijk < 0) or np.any(ijk >= labels.shape):
            assert region.index is None and region.text == "outside the atlas"
            outside += 1
            continue
        want = int(labels[tuple(ijk)])
        assert region.index == want and region.name == names[want]
        assert region.text == ("background" if want == 0 else names[want])
        inside += 1
    assert inside > 50 and outside > 50  # both cases were met
    # the centre of every atlas voxel maps back to that voxel exactly
    for ijk in [(0, 0, 0), (10, 8, 7), (5, 3, 2)]:
        mm = apply_affine(nib.load(path).affine, ijk)
        assert atlas.voxel_of(mm) == ijk


def test_label_not_in_the_table_is_said():
    a = Atlas(None, None, np.full((1, 1, 1), 5), np.eye(4), {1: "a"})
    assert a.region_at((0, 0, 0)).text == "label 5 (not in the table)"
    assert a.region_at((0, 0, 0)).to_json() == {
        "index": 5,
        "name": None,
        "text": "label 5 (not in the table)",
    }


@pytest.mark.parametrize(
    "text, needle",
    [
        ("index\tname\n1\thand\nx\tear\n", r"row 3, column index: 'x' is not a whole number"),
        ("index\tname\n1\thand\n1\tear\n", r"row 3, column index: 1 is already named in row 2"),
        ("index\tname\n1\thand\n2\t\n", r"row 3, column name: label 2 has no name"),
        ("index\tlabel\n1\thand\n", r"row 1 \(header\): no column 'name'"),
        ("index\tname\n1\thand\textra\n", r"row 2 has 3 tab-separated cells"),
        ("index\tname\n-3\thand\n", r"row 2, column index: -3 is negative"),
        ("", r"the label table is empty"),
    ],
)
def test_bad_label_table_is_one_line_naming_file_row_and_column(tmp_path, text, needle):
    p = tmp_path / "x_dseg.tsv"
    p.write_text(text)
    with pytest.raises(InputError, match=needle) as err:
        read_label_table(p)
    line = str(err.value)
    assert line.startswith(str(p)) and "\n" not in line


def test_label_table_found_by_bids_name_or_given(tmp_path):
    path, _ = _write_atlas(tmp_path, table=None)
    with pytest.raises(InputError, match=r"no label table beside the atlas") as err:
        load_atlas(path)
    assert err.value.remedy == "atlas_labels"
    # a dataset-level table whose entities all belong to the image
    (tmp_path / "space-X_atlas-demo_dseg.tsv").write_text(TABLE)
    (tmp_path / "space-Y_atlas-demo_dseg.tsv").write_text("index\tname\n1\twrong\n")
    assert find_label_table(path).name == "space-X_atlas-demo_dseg.tsv"
    # the image's own table wins
    own = tmp_path / "sub-01_space-X_atlas-demo_dseg.tsv"
    own.write_text("index\tname\n1\town\n")
    assert find_label_table(path) == own
    given = tmp_path / "mine.tsv"
    given.write_text("index\tname\n1\tgiven\n")
    assert load_atlas(path, given).names == {1: "given"}


def test_atlas_must_hold_whole_numbers(tmp_path):
    p = tmp_path / "prob_dseg.nii.gz"
    nib.save(nib.Nifti1Image(np.full((3, 3, 3), 0.4, np.float32), np.eye(4)), p)
    (tmp_path / "prob_dseg.tsv").write_text(TABLE)
    with pytest.raises(InputError, match="not whole numbers"):
        load_atlas(p)


def test_atlas_through_the_one_way_in(tmp_path):
    """The loader opens the atlas before the run; a text file named .nii.gz as the atlas is
    the not-gzip line (issue 17 item 12); the atlas is an input, never an output."""
    from voxelscope.core.loader import InputRequest, load_inputs

    run = tmp_path / "run.nii"
    nib.save(nib.Nifti1Image(np.ones((3, 3, 3, 4), np.float32), np.eye(4)), run)
    path, _ = _write_atlas(tmp_path)
    got = load_inputs(InputRequest(run, atlas=path, events_required=False))
    assert got.atlas is not None and got.atlas.names[2] == "hearing area"
    assert got.used_files()["atlas"] == str(path)
    assert path in InputRequest(run, atlas=path).input_paths()
    fake = tmp_path / "fake_dseg.nii.gz"
    fake.write_text("index\tname\n")
    (tmp_path / "fake_dseg.tsv").write_text(TABLE)
    with pytest.raises(InputError, match="not a gzip-compressed NIfTI image"):
        load_inputs(InputRequest(run, atlas=fake, events_required=False))
    with pytest.raises(InputError, match="no atlas image was given") as err:
        load_inputs(InputRequest(run, atlas_labels=tmp_path / "fake_dseg.tsv"))
    assert err.value.remedy == "atlas"
