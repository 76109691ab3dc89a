"""One word per concept: the words we replaced stay out of the package and the README.

DEVELOPERS.md ("Words we use") says which word we use for what. This test reads every
``.py`` file under ``voxelscope/`` (code, docstrings, messages, comments) and the README,
line by line, and fails on a word from that table's "Not" column. ``ALLOWED`` names the few
lines where such a word means something else (a drawing frame, BIDS's ``anat`` folder, the
hidden alias of an old flag); an entry that no longer matches any line fails too, so the
list stays short and true.

``beta`` is the one word that stays in its other meaning: ``beta``/``betas`` are the design
columns' coefficients. The contrast's value ``c'b`` is the ``estimate``, so what is kept out
is ``beta`` as a name: an attribute (``.beta``), a key or quoted name (``"beta"``), a keyword
argument (``beta=``), ``beta_kept`` and a CSV header's ``,beta,``. The allowed lines are where
users' files and scripts keep the earlier name working.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: Word -> the pattern that finds it (case-insensitive, whole words) and what to write instead.
WORDS: dict[str, tuple[str, str]] = {
    "frame": (r"\bframes?\b|\bframe[_-]to[_-]frame\b", "volume (one 3-D image of a run)"),
    "frame_times": (r"\bframe_times?\b|\bn_frames\b", "volume_times / n_volumes"),
    "time point": (r"\btime[ _-]?points?\b", "volume"),
    "underlay": (r"\bunderlays?\b", "anatomy (the image) or backdrop (the grey layer)"),
    "anat": (r"\banat\b", "anatomy"),
    "stat_map": (r"\bstat_maps?\b", "map (the image) or overlay (what is drawn over the slices)"),
    "beta": (
        r"\.beta\b|[\"'`]beta[\"'`]|\bbeta=|\bbeta_kept\b|,beta,",
        "estimate (the contrast's c'b); beta/betas stay only for the design columns' coefficients",
    ),
}

#: (word, file relative to the repository, text on the line, why another meaning is right).
ALLOWED: list[tuple[str, str, str, str]] = [
    ("anat", "voxelscope/cli/view.py", '"--anat", dest="anatomy"', "the earlier flag, hidden"),
    ("anat", "voxelscope/gui/app.py", '/ "anat" /', "BIDS's own folder name for anatomy"),
    ("frame", "voxelscope/gui/checks_panel.py", "per frame would take", "frames of a drag"),
    ("frame", "voxelscope/gui/sizing.py", "# frame, buttons and padding", "a widget's frame"),
    ("frame", "voxelscope/gui/sizing.py", "every frame of a drag", "frames of a drag"),
    ("beta", "README.md", "(also as `beta`, its earlier key)", "fit JSON's legacy key"),
    ("beta", "voxelscope/cli/fit.py", "the earlier key of the estimate", "fit JSON's legacy key"),
    ("beta", "voxelscope/cli/fit.py", '_CSV_ESTIMATE = "beta"', "CSV column kept for scripts"),
    ("beta", "voxelscope/cli/map.py", "the earlier name of ``estimate``", "--stat beta, hidden"),
    ("beta", "voxelscope/cli/map.py", '_stat("beta")', "--stat beta, hidden (doctest)"),
    ("beta", "voxelscope/core/combine.py", "earlier key", "combined JSON's legacy key"),
    ("beta", "voxelscope/core/maps.py", '{"beta": "estimate"}', "--stat beta and old sessions"),
    ("beta", "voxelscope/core/runs_report.py", "contrast,beta,variance", "combined.csv column"),
    ("beta", "voxelscope/core/runs_report.py", "``beta`` holds the contrast", "combined.csv"),
    ("beta", "voxelscope/core/sweep.py", "saved it as ``beta``", "the earlier results format"),
]


def _files() -> list[Path]:
    return [*sorted((ROOT / "voxelscope").rglob("*.py")), ROOT / "README.md"]


def _hits() -> list[tuple[str, str, int, str]]:
    """(word, relative path, line number, line) for every use of a replaced word."""
    found = []
    for path in _files():
        rel = path.relative_to(ROOT).as_posix()
        for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            for word, (pattern, _) in WORDS.items():
                if re.search(pattern, line, flags=re.IGNORECASE):
                    found.append((word, rel, n, line.strip()))
    return found


def _allowed(word: str, rel: str, line: str) -> bool:
    return any(w == word and f == rel and text in line for w, f, text, _ in ALLOWED)


def test_replaced_words_stay_out():
    bad = [h for h in _hits() if not _allowed(h[0], h[1], h[3])]
    assert bad == [], "\n".join(
        f"{rel}:{n}: '{word}' -> use {WORDS[word][1]}: {line}" for word, rel, n, line in bad
    )


def test_every_allowed_line_still_exists():
    hits = _hits()
    stale = [
        a for a in ALLOWED if not any(h[0] == a[0] and h[1] == a[1] and a[2] in h[3] for h in hits)
    ]
    assert stale == [], f"no longer needed, take them off ALLOWED: {stale}"


@pytest.mark.parametrize(
    "text, word",
    [
        ("the data have 3 time points", "time point"),
        ("Open &underlay…", "underlay"),
        ("state.stat_map", "stat_map"),
        ("design.frame_times", "frame_times"),
        ("the frame-to-frame change", "frame"),
        ("--anat FILE", "anat"),
        ("m.beta[2, 3, 1]", "beta"),
        ('flat["beta"][idx] = est', "beta"),
        ("_fmt(c.estimate, 'beta')", "beta"),
        ("MapResult(t=t, beta=vol)", "beta"),
        ("BETA_KEPT = 0.5", "beta"),
        ('"run,kernel,contrast,beta,variance"', "beta"),
        ("(``t``, ``beta``, ``variance``)", "beta"),
    ],
)
def test_the_patterns_find_what_they_guard(text, word):
    assert re.search(WORDS[word][0], text, flags=re.IGNORECASE)


@pytest.mark.parametrize(
    "text",
    [
        "framewise_displacement",
        "QFrame",
        "self.frameWidth()",
        "--anatomy",
        "anatomical",
        "res.betas[cols, 0]",
        "fit_sums(prep, sums, w, betas=False)",
        "so each one's beta is its own effect",
        "special.betainc(0.5, df / 2, x)",
        '"betas": f.betas,',
    ],
)
def test_the_patterns_leave_other_words_alone(text):
    assert not any(re.search(p, text, flags=re.IGNORECASE) for p, _ in WORDS.values())
