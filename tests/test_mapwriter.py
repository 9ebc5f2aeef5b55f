"""`hamstride landmarks TRIAL --write-map FILE`: a marker map proposed from a file's own labels (issue 15).

Three labelling styles, all invented for these tests: hamstride's own (``r.knee.lat``), an all-capitals
four-letter style (side letter + three letters of the anatomical name: ``RFEL`` = right femoral epicondyle,
lateral) and a dotted style with capitalised words (``L.Knee``, ``L.Knee.Med``), each with upper-body markers as
distractors and with or without a ``SUBJECT:`` prefix. The truth is the relabelling table below, which the writer
never sees: every landmark the file holds must get its label.
"""
from __future__ import annotations

import tomllib

import numpy as np
import pytest

from hamstride import cli
from hamstride.io import write_c3d
from hamstride.landmarks import DEFAULT_CLUSTERS, DEFAULT_LABELS, load_marker_map
from hamstride.mapwriter import map_toml, parse_label, propose_map
from hamstride.synth import SprintSpec, simulate_sprint

_CAPS = {"asis": "ILA", "psis": "ILP", "lateral_epicondyle": "FEL", "medial_epicondyle": "FEM",
         "lateral_malleolus": "MLL", "medial_malleolus": "MLM", "heel": "CAL", "first_metatarsal": "MT1",
         "fifth_metatarsal": "MT5", "toe_tip": "HAL"}
_DOTTED = {"asis": "ASIS", "psis": "PSIS", "lateral_epicondyle": "Knee", "medial_epicondyle": "Knee.Med",
           "lateral_malleolus": "Ankle", "medial_malleolus": "Ankle.Med", "heel": "Heel", "first_metatarsal": "Meta1",
           "fifth_metatarsal": "Meta5", "toe_tip": "Toe"}


def _style(name: str) -> tuple[dict[str, str], dict[str, tuple[str, ...]], list[str]]:
    """(landmark -> label, cluster -> labels, distractor labels) of one invented labelling style."""
    if name == "ours":
        return dict(DEFAULT_LABELS), dict(DEFAULT_CLUSTERS), ["c7", "sternum", "r.shoulder", "l.elbow", "r.wrist"]
    landmarks, clusters = {}, {}
    for landmark in DEFAULT_LABELS:
        side, site = landmark.split("_", 1)
        if name == "caps":
            landmarks[landmark] = side[0].upper() + _CAPS[site]
        else:
            landmarks[landmark] = f"{side[0].upper()}.{_DOTTED[site]}"
    for cluster in DEFAULT_CLUSTERS:
        side, segment, _ = cluster.split("_")
        if name == "caps":
            clusters[cluster] = tuple(f"{side[0].upper()}{segment[:2].upper()}{k}" for k in (1, 2, 3))
        else:
            clusters[cluster] = tuple(f"{side[0].upper()}.{segment.capitalize()}{k}" for k in (1, 2, 3))
    distractors = (["CV07", "STRN", "RSHO", "LSHO", "RELB", "LWRI", "RHDF", "LHDB", "SACR"] if name == "caps" else
                   ["C7", "Sternum", "R.Shoulder", "L.Elbow", "R.Wrist", "Head.Top", "Head.Back"])
    return landmarks, clusters, distractors


STYLES = ("ours", "caps", "dotted")


@pytest.mark.parametrize("prefix", ["", "Ath07:"])
@pytest.mark.parametrize("style", STYLES)
def test_every_landmark_in_the_file_gets_its_label(style, prefix):
    landmarks, clusters, distractors = _style(style)
    labels = [prefix + lab for lab in [*distractors, *landmarks.values(), *(x for c in clusters.values() for x in c)]]
    proposal = propose_map(labels[::-1])  # order must not matter
    for landmark, label in landmarks.items():
        assert proposal.label_of(landmark) == label, (landmark, proposal.label_of(landmark))
    assert {g.name: g.labels for g in proposal.clusters} == clusters
    assert proposal.prefix == prefix and not proposal.keep_prefix and proposal.unresolved == ()
    # the TOML loads as a marker map naming exactly these labels
    marker_map = load_marker_map_text(map_toml(proposal, "trial.c3d"))
    assert {k: marker_map.landmarks[k] for k in landmarks} == landmarks
    assert {k: marker_map.clusters[k] for k in clusters} == clusters


def load_marker_map_text(text: str):
    import tempfile
    from pathlib import Path

    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "map.toml"
        path.write_text(text, encoding="utf-8")
        return load_marker_map(path)


@pytest.mark.parametrize("style", STYLES)
def test_landmarks_missing_from_the_file_are_left_to_fill_in(style):
    landmarks, _, distractors = _style(style)
    absent = ("left_toe_tip", "right_toe_tip", "right_medial_malleolus", "left_medial_epicondyle")
    labels = [lab for name, lab in landmarks.items() if name not in absent] + distractors
    proposal = propose_map(labels)
    assert set(proposal.unresolved) == set(absent)
    for name, label in landmarks.items():
        if name not in absent:
            assert proposal.label_of(name) == label
    text = map_toml(proposal, "trial.c3d")
    for name in absent:
        assert f'# {name} = ""' in text
    # lines left commented keep the default labels when loaded, so the map still loads
    assert tomllib.loads(text)["landmarks"].keys() == {n for n in landmarks if n not in absent}


def test_two_subjects_in_one_file_name_the_prefix():
    landmarks, _, _ = _style("caps")
    labels = [f"Ath07:{lab}" for lab in landmarks.values()] + [f"Ath09:{lab}" for lab in list(landmarks.values())[:5]]
    proposal = propose_map(labels)
    assert proposal.keep_prefix and proposal.prefix == "Ath07:" and proposal.other_prefixes == ("Ath09:",)
    assert proposal.label_of("right_heel") == "Ath07:RCAL"
    assert "several subjects" in map_toml(proposal, "t.c3d")


def test_ambiguous_labels_list_the_other_candidates():
    proposal = propose_map(["r.knee", "r.knee.lat", "r.knee.med", "R.FEL"])
    guess = next(g for g in proposal.landmarks if g.name == "right_lateral_epicondyle")
    assert guess.labels == ("r.knee.lat",) and set(guess.alternatives) == {"r.knee", "R.FEL"}
    assert "# right_lateral_epicondyle: other candidates: " in map_toml(proposal, "t.c3d")


@pytest.mark.parametrize("label,side,core", [("Ath07:RFEL", "right", "fel"), ("L.Knee.Med", "left", "kneemed"),
                                              ("r.knee.lat", "right", "kneelat"), ("LeftAnkle", "left", "ankle"),
                                              ("KNEE_R", "right", "knee"), ("STRN", None, "strn")])
def test_label_parsing(label, side, core):
    parsed = parse_label(label)
    assert (parsed.side, parsed.core) == (side, core)


@pytest.mark.parametrize("prefix", ["", "Ath07:"])
@pytest.mark.parametrize("style", ["caps", "dotted"])
def test_write_map_command_end_to_end(style, prefix, tmp_path, capsys):
    """A generated trial relabelled in another style (with or without a subject prefix): `--write-map`, then
    `--markers` resolves every landmark at the coordinates of the original (default-labelled) markers."""
    landmarks, clusters, distractors = _style(style)
    spec = SprintSpec(duration_s=0.6, n_gaps=0, seed=3)
    labels, xyz, _ = simulate_sprint(spec)
    rename = {DEFAULT_LABELS[k]: v for k, v in landmarks.items()}
    rename.update({a: b for k in clusters for a, b in zip(DEFAULT_CLUSTERS[k], clusters[k])})
    new_labels = [prefix + rename.get(lab, lab) for lab in labels]
    assert set(new_labels).isdisjoint(DEFAULT_LABELS.values())
    extra = np.repeat(xyz[:, :1, :] + np.array([0.0, 0.0, 600.0]), len(distractors), axis=1)  # above the pelvis
    trial = write_c3d(tmp_path / "run.c3d", new_labels + [prefix + d for d in distractors], np.concatenate([xyz, extra], axis=1),
                      spec.rate_hz, units=spec.units)
    map_path = tmp_path / "lab_markers.toml"
    assert cli.main(["landmarks", str(trial), "--write-map", str(map_path)]) == 0
    out = capsys.readouterr().out
    assert "20 of 20 landmarks guessed" in out
    again = cli.main(["landmarks", str(trial), "--write-map", str(map_path)])
    assert again == 2 and "--overwrite" in capsys.readouterr().err
    assert cli.main(["landmarks", str(trial), "--markers", str(map_path)]) == 0
    capsys.readouterr()
    # the relabelled file read through the written map gives the points the original file gives by default labels
    from hamstride.io import read_c3d
    from hamstride.landmarks import resolve_landmarks

    original = write_c3d(tmp_path / "original.c3d", labels, xyz, spec.rate_hz, units=spec.units)
    expected = resolve_landmarks(read_c3d(original))
    got = resolve_landmarks(read_c3d(trial), load_marker_map(map_path))
    assert set(got.points) == set(expected.points) == set(DEFAULT_LABELS)
    for landmark in DEFAULT_LABELS:
        np.testing.assert_array_equal(got.points[landmark], expected.points[landmark])
    for cluster in DEFAULT_CLUSTERS:
        np.testing.assert_array_equal(got.clusters[cluster], expected.clusters[cluster])


@pytest.mark.parametrize("labels", [
    # invented styles beyond the three above: words with the side first, camel case, side last
    ["R_FemLatEpi", "R_FemMedEpi", "R_MallLat", "R_MallMed", "R_Calc", "R_MH1", "R_5MT", "R_Hallux", "R_ASIS",
     "R_PSIS"],
    ["RightKneeLateral", "RightKneeMedial", "RightAnkleLateral", "RightAnkleMedial", "RightHeel", "RightMet1",
     "RightMet5", "RightToe", "RightAsis", "RightPsis"],
    ["KNEE_R", "KNEE_MED_R", "ANKLE_R", "ANKLE_MED_R", "HEEL_R", "MT1_R", "MT5_R", "TOE_R", "ASIS_R", "PSIS_R"],
], ids=["words", "camel", "side_last"])
def test_other_label_styles(labels):
    sites = ("lateral_epicondyle", "medial_epicondyle", "lateral_malleolus", "medial_malleolus", "heel",
             "first_metatarsal", "fifth_metatarsal", "toe_tip", "asis", "psis")
    proposal = propose_map(labels)
    assert {site: proposal.label_of(f"right_{site}") for site in sites} == dict(zip(sites, labels))


def test_write_map_for_a_two_subject_file_resolves_the_named_subject(tmp_path, capsys):
    """A file holding two subjects' markers: the written map names the labels with the chosen subject's prefix,
    and that map resolves every landmark (without it the file is refused as holding several subjects)."""
    landmarks, _, _ = _style("dotted")
    spec = SprintSpec(duration_s=0.6, n_gaps=0, seed=4)
    labels, xyz, _ = simulate_sprint(spec)
    rename = {DEFAULT_LABELS[k]: v for k, v in landmarks.items()}
    first = [f"Ath07:{rename.get(lab, lab)}" for lab in labels]
    second = [f"Ath09:{rename.get(lab, lab)}" for lab in labels[:6]]  # a few markers of a second person
    trial = write_c3d(tmp_path / "two.c3d", first + second, np.concatenate([xyz, xyz[:, :6] + 2000.0], axis=1),
                      spec.rate_hz, units=spec.units)
    map_path = tmp_path / "map.toml"
    assert cli.main(["landmarks", str(trial), "--write-map", str(map_path)]) == 0
    assert load_marker_map(map_path).landmarks["right_heel"] == "Ath07:R.Heel"
    assert cli.main(["landmarks", str(trial), "--markers", str(map_path)]) == 0
    capsys.readouterr()
