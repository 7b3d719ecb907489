"""What the repository prints and ships says things in its own words (issue 12, items 12-13).

- No dongle maker or brand is named anywhere: ids are facts, product names are not ours. The
  test holds only truncated SHA-256 digests of the words it looks for, so that it names none.
- The IAU 1985 Galactic constants are cited by journal reference (MNRAS 221, 1023, 1986),
  never as an author-year pair.
- The udev rules and the modprobe blacklist have names of the project's own, so that copying
  them into /etc cannot replace a file a distribution ships.
- DEVELOPERS.md names only files that exist.
"""

import hashlib
import re
from pathlib import Path

from spinflip.daemon.commands import station_probes

REPO = Path(__file__).resolve().parents[1]
TEXT_SUFFIXES = {".py", ".md", ".toml", ".rules", ".conf", ".service", ".sh", ".c", ".txt"}

#: sha256(word)[:16] of maker and brand names of SDR dongles and television sticks (words and
#: two-word names, lower case).
BRAND_DIGESTS = {
    "511e64554d2b55c0", "17fe5c1a779b31af", "315da70d41501549", "b3676c1e89eeb135",
    "19e8d61ca2e10d4a", "249b9966f455edde", "8d90af40e1576624", "866c934f1c874c06",
    "34b80a3b038c96d0", "cd48dcf9dc560eef", "b1253474954b26ff", "5ff03a3b4bc7bbeb",
}


def _files():
    skip = {".git", ".venv", "spinflip.egg-info", "__pycache__", ".pytest_cache"}
    for p in REPO.rglob("*"):
        if p.is_file() and p.suffix in TEXT_SUFFIXES and not skip & set(p.parts):
            yield p


def _digest(word: str) -> str:
    return hashlib.sha256(word.encode()).hexdigest()[:16]


def test_no_dongle_maker_or_brand_is_named():
    found = []
    for p in _files():
        words = re.findall(r"[a-z0-9][a-z0-9-]*", p.read_text(errors="replace").lower())
        names = set(words) | {f"{a} {b}" for a, b in zip(words, words[1:], strict=False)}
        hits = {_digest(n) for n in names} & BRAND_DIGESTS
        if hits:
            found.append(f"{p.relative_to(REPO)}: {sorted(hits)}")
    assert not found, found


def test_doctor_describes_usb_ids_generically():
    assert ("0bda", "2838") in station_probes.RTL2832U_USB_IDS
    for ids, text in station_probes.RTL2832U_USB_IDS.items():
        assert re.fullmatch(r"[0-9a-f]{4}", ids[0]) and re.fullmatch(r"[0-9a-f]{4}", ids[1])
        assert text.startswith("RTL2832U "), (ids, text)
    source = (REPO / "daemon" / "commands" / "station_probes.py").read_text()
    assert "librtlsdr.c" not in source     # no pointer into a driver's own device list


def test_iau_1985_constants_are_cited_by_journal_reference_only():
    author_year = re.compile(r"[A-Z][a-z]+(?:-[A-Z][a-z]+)?(?:,(?: [A-Z]\.)+)?\s+(?:&|and)\s+"
                             r"[A-Z][a-z]+(?:-[A-Z][a-z]+)?(?:,(?: [A-Z]\.)+)?,?\s+1986")
    cited = 0
    for p in _files():
        text = p.read_text(errors="replace")
        cited += text.count("MNRAS 221, 1023")
        for n, line in enumerate(text.splitlines(), 1):
            if "MNRAS 221" in line and p != Path(__file__).resolve():   # whole, no author
                assert "MNRAS 221, 1023" in line and "&" not in line and "et al" not in line, \
                    f"{p.relative_to(REPO)}:{n}: {line.strip()}"
        assert not author_year.search(text), f"{p.relative_to(REPO)}: " \
            f"{author_year.search(text).group(0)!r}"
    assert cited >= 3


def test_udev_and_modprobe_files_have_project_names():
    shipped = [p for p in (REPO / "hardware").iterdir() if p.suffix in (".rules", ".conf")]
    assert len(shipped) >= 3
    for p in shipped:
        assert "spinflip" in p.name, p.name
    for p in _files():                    # and every install line uses those names
        for m in re.finditer(r"hardware/([\w.-]+\.(?:rules|conf))", p.read_text(errors="replace")):
            assert (REPO / "hardware" / m.group(1)).is_file(), (p, m.group(0))


def test_developers_guide_names_only_files_that_exist():
    text = (REPO / "DEVELOPERS.md").read_text()
    named = set(re.findall(r"\b((?:daemon|tests|tui|pkg|hardware|systemd|scripts)/[\w./-]+"
                           r"\.\w+)", text))
    assert len(named) > 8
    missing = sorted(n for n in named if not (REPO / n).exists())
    assert not missing, missing
