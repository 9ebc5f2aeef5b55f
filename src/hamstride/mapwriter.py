"""Propose a marker map for a lab's own labels (``hamstride landmarks TRIAL --write-map FILE``).

Each label is split into a side (l/left/r/right, a leading L or R of an all-capitals label, or a separate token),
an optional ``SUBJECT:`` prefix, and a core (the rest, lower case, separators removed). The core is matched
against common abbreviations of each anatomical name (e.g. the lateral femoral epicondyle as ``knee``, ``kne``,
``knee.lat``, ``fel``, ``lep``, ``lateral_epicondyle``); an explicit lateral/medial word scores higher than the
bare joint name, which by convention marks the lateral side. Labels are then assigned greedily, best score first,
so no label serves two landmarks. The result is a TOML marker map with the best guess per landmark, a comment
listing the other candidates, and commented lines for landmarks without a candidate.
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Sequence

from .landmarks import CLUSTER_SEGMENTS, OPTIONAL_SITES, REQUIRED_SITES
from .numerics import SIDES

__all__ = ["SIDE_WORDS", "SITE_PATTERNS", "CLUSTER_PATTERNS", "ParsedLabel", "Guess", "ProposedMap", "parse_label",
           "propose_map", "map_toml"]

SIDE_WORDS = {"l": "left", "left": "left", "lt": "left", "lft": "left",
              "r": "right", "right": "right", "rt": "right", "rgt": "right"}

# Abbreviations of the anatomical names (common practice in labs' label sets; lower case, separators removed).
_ANT = r"(a|ant|anterior)"
_POST = r"(p|post|posterior)"
_SUP = r"(s|sup|superior)?"
_ILIAC = r"(i|il|ili|ilia|iliac|ilium)"
_SPINE = r"(s|sp|spine)?"
_KNEE = r"(knee|kne|kn|femur|fem|fe|epicondyle|epicon|epi|ep|condyle|con|fc|fec)"
_ANKLE = r"(ankle|ank|an|malleolus|malleoli|mall|mal|ml)"
_LAT = r"(lateral|lat|la|l|ext|external|outer|out)"
_MED = r"(medial|med|me|m|int|internal|inner|in)"
_MT = r"(metatarsal|metatarsus|meta|met|mt|mth|mh|m)"
_HEAD = r"(head|hd|h|p|prox)?"

# site -> [(pattern on the core, score)]; a higher score is a more explicit name.
SITE_PATTERNS: dict[str, list[tuple[str, float]]] = {
    "asis": [(rf"{_ANT}{_SUP}{_ILIAC}?{_SPINE}", 0.9), (rf"{_ILIAC}{_ANT}{_SUP}{_SPINE}", 0.9),
             (r"asis", 1.0)],
    "psis": [(rf"{_POST}{_SUP}{_ILIAC}?{_SPINE}", 0.9), (rf"{_ILIAC}{_POST}{_SUP}{_SPINE}", 0.9),
             (r"psis", 1.0)],
    "lateral_epicondyle": [(rf"{_KNEE}+{_LAT}{_KNEE}*", 0.9), (rf"{_LAT}{_KNEE}+", 0.9), (_KNEE, 0.6),
                           (r"lateralepicondyle|latepicondyle|lep|lfe|lfec", 1.0)],
    "medial_epicondyle": [(rf"{_KNEE}+{_MED}{_KNEE}*", 0.9), (rf"{_MED}{_KNEE}+", 0.9),
                          (r"medialepicondyle|medepicondyle|mep|mfe|mfec", 1.0)],
    "lateral_malleolus": [(rf"{_ANKLE}+{_LAT}{_ANKLE}*", 0.9), (rf"{_LAT}{_ANKLE}+", 0.9), (_ANKLE, 0.6),
                          (r"lateralmalleolus|latmalleolus|lmal|lm", 1.0)],
    "medial_malleolus": [(rf"{_ANKLE}+{_MED}{_ANKLE}*", 0.9), (rf"{_MED}{_ANKLE}+", 0.9),
                         (r"medialmalleolus|medmalleolus|mmal|mm", 1.0)],
    "heel": [(r"heel|hee|hel|calcaneus|calcaneum|calc|cal|ca", 0.9)],
    "first_metatarsal": [(rf"{_MT}(1|i|one|first){_HEAD}", 0.9), (rf"(1|first)(st)?{_MT}{_HEAD}", 0.9),
                         (rf"{_MT}{_HEAD}(1|i)", 0.8)],
    "fifth_metatarsal": [(rf"{_MT}(5|v|five|fifth){_HEAD}", 0.9), (rf"(5|fifth)(th)?{_MT}{_HEAD}", 0.9),
                         (rf"{_MT}{_HEAD}(5|v)", 0.8)],
    "toe_tip": [(r"toe|toetip|toes|tip|hallux|hal|hlx|ht|tt", 0.9)],
}
CLUSTER_PATTERNS = {
    "thigh": r"(thigh|thi|th|tgh|tigh|femcl|thighcluster|thcl)",
    "shank": r"(shank|sha|shk|sh|shin|tib|tibia|tb|leg|shankcluster|shcl)",
}
_CLUSTER_INDEX = r"(cl|cluster|c|pl|plate)?([a-d]|[1-4])"


@dataclass(frozen=True)
class ParsedLabel:
    label: str  # as in the file
    prefix: str  # "SUBJECT:" or ""
    side: str | None
    core: str


@dataclass(frozen=True)
class Guess:
    name: str  # landmark or cluster name
    labels: tuple[str, ...]  # chosen label(s) without the subject prefix (empty: unresolved)
    alternatives: tuple[str, ...] = ()


@dataclass(frozen=True)
class ProposedMap:
    landmarks: tuple[Guess, ...]
    clusters: tuple[Guess, ...]
    prefix: str  # the subject prefix the chosen labels carry in the file ("" if none)
    other_prefixes: tuple[str, ...] = ()
    keep_prefix: bool = False  # the file holds several subjects: the map names the chosen one's prefix

    def label_of(self, name: str) -> str | None:
        guess = next((g for g in self.landmarks if g.name == name), None)
        return guess.labels[0] if guess and guess.labels else None

    @property
    def unresolved(self) -> tuple[str, ...]:
        return tuple(g.name for g in self.landmarks if not g.labels)


_TOKENS = re.compile(r"[A-Z]+(?![a-z])|[A-Z]?[a-z]+|\d+")


def parse_label(label: str) -> ParsedLabel:
    """Split a C3D label into subject prefix, side and core (see the module docstring)."""
    prefix, _, rest = label.rpartition(":")
    prefix = f"{prefix}:" if prefix else ""
    tokens = [t for t in _TOKENS.findall(rest)]
    side = None
    if tokens and tokens[0].lower() in SIDE_WORDS and len(tokens) > 1:
        side, tokens = SIDE_WORDS[tokens[0].lower()], tokens[1:]
    elif tokens and tokens[-1].lower() in SIDE_WORDS and len(tokens) > 1:
        side, tokens = SIDE_WORDS[tokens[-1].lower()], tokens[:-1]
    elif tokens and len(tokens[0]) > 1 and tokens[0][0].lower() in "lr" and (
            tokens[0].isupper() or tokens[0].islower()):
        # all-capitals (or all-lower-case) labels without a separator: the side is the first letter (RFEL, lfel)
        side, tokens = SIDE_WORDS[tokens[0][0].lower()], [tokens[0][1:]] + tokens[1:]
    return ParsedLabel(label, prefix, side, "".join(tokens).lower())


def _site_score(core: str, site: str) -> float:
    return max((score for pattern, score in SITE_PATTERNS[site] if re.fullmatch(pattern, core)), default=0.0)


def propose_map(labels: Sequence[str]) -> ProposedMap:
    """Best guess of each landmark's and cluster's label among ``labels`` (a C3D file's point labels)."""
    parsed = [parse_label(lab) for lab in labels if lab.strip()]
    prefixes = [p.prefix for p in parsed]
    # The subject whose labels resolve the most landmarks (a file may hold several subjects' markers).
    by_prefix = {pre: [p for p in parsed if p.prefix == pre] for pre in dict.fromkeys(prefixes)}
    sites = REQUIRED_SITES + OPTIONAL_SITES

    def resolved(group: list[ParsedLabel]) -> int:
        return sum(any(p.side and _site_score(p.core, s) > 0 for p in group) for s in sites)

    prefix = max(by_prefix, key=lambda pre: (resolved(by_prefix[pre]), -prefixes.index(pre))) if by_prefix else ""
    group = by_prefix.get(prefix, [])
    others = tuple(p for p in by_prefix if p != prefix)
    keep_prefix = bool(prefix) and bool(others)

    def shown(p: ParsedLabel) -> str:
        return p.label if keep_prefix or not p.prefix else p.label[len(p.prefix):]

    candidates: list[tuple[float, int, str, ParsedLabel]] = []
    for order, p in enumerate(group):
        if p.side is None:
            continue
        for site in sites:
            score = _site_score(p.core, site)
            if score > 0:
                candidates.append((score, -order, f"{p.side}_{site}", p))
    candidates.sort(key=lambda c: (-c[0], -c[1]))
    chosen: dict[str, ParsedLabel] = {}
    used: set[str] = set()
    for _, _, name, p in candidates:
        if name not in chosen and p.label not in used:
            chosen[name] = p
            used.add(p.label)
    guesses = []
    for side in SIDES:
        for site in sites:
            name = f"{side}_{site}"
            alternatives = tuple(dict.fromkeys(shown(p) for _, _, n, p in candidates
                                               if n == name and p is not chosen.get(name)))
            guesses.append(Guess(name, (shown(chosen[name]),) if name in chosen else (), alternatives))
    clusters = []
    for side in SIDES:
        for segment in CLUSTER_SEGMENTS:
            members = sorted((p for p in group if p.side == side and p.label not in used
                              and re.fullmatch(CLUSTER_PATTERNS[segment] + _CLUSTER_INDEX, p.core)),
                             key=lambda p: p.label)
            clusters.append(Guess(f"{side}_{segment}_cluster",
                                  tuple(shown(p) for p in members) if len(members) >= 3 else ()))
    return ProposedMap(tuple(guesses), tuple(clusters), prefix, others, keep_prefix)


def _quote(label: str) -> str:
    return '"' + label.replace("\\", "\\\\").replace('"', '\\"') + '"'


def map_toml(proposal: ProposedMap, source: str, version: str = "") -> str:
    """The proposed map as a commented TOML marker map (loads with landmarks.load_marker_map)."""
    n_found = sum(1 for g in proposal.landmarks if g.labels)
    lines = [f"# Marker map proposed by hamstride {version} from {source}.".replace("  ", " "),
             f"# {n_found} of {len(proposal.landmarks)} landmarks have a guess. Check every line against your "
             "marker protocol;",
             "# a line starting with # is ignored: fill in the label and remove the # to use it.",
             "# Labels are compared without letter case."]
    if proposal.prefix and not proposal.keep_prefix:
        lines.append(f"# The labels in the file carry the subject prefix '{proposal.prefix}'; the map names them "
                     "without it, so it serves every athlete.")
    if proposal.keep_prefix:
        subjects = ", ".join([proposal.prefix, *proposal.other_prefixes])
        lines.append(f"# The file holds the markers of several subjects ({subjects}); this map names the labels "
                     f"of '{proposal.prefix}'.")
    lines += ["", "[landmarks]"]
    for guess in proposal.landmarks:
        optional = guess.name.endswith(OPTIONAL_SITES)
        if guess.labels:
            if guess.alternatives:
                lines.append(f"# {guess.name}: other candidates: {', '.join(guess.alternatives)}")
            lines.append(f"{guess.name} = {_quote(guess.labels[0])}")
        else:
            why = "optional; " if optional else ""
            lines.append(f"# {guess.name} = \"\"  # {why}no label in the file looks like it: fill it in")
    lines += ["", "[clusters]"]
    for guess in proposal.clusters:
        if guess.labels:
            lines.append(f"{guess.name} = [{', '.join(_quote(lab) for lab in guess.labels)}]")
        else:
            lines.append(f"# {guess.name} = [\"\", \"\", \"\"]  # optional (static-trial calibration): at least "
                         "3 labels")
    return "\n".join(lines) + "\n"
