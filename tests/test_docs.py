"""The documentation stays true to the code: every config key the code
accepts is in docs/config.md, and every relative link in README.md,
DEVELOPERS.md and docs/ resolves (files and #anchors).

The keys are taken from the code itself (``config.SECTIONS``, the noise
module's key sets) or, where a parser keeps them to itself, from its refusal
of an unknown key, which lists the keys it allows. A new key therefore
fails here until it is documented.
"""

import copy
import re
from pathlib import Path

import pytest
from conftest import ROOT, two_ion_config

from mdrotor.config import noise as noise_keys
from mdrotor.config import parse as config
from mdrotor.errors import InputError

DOCS = ROOT / "docs"
CONFIG_DOC = DOCS / "config.md"


def _allowed_from_refusal(raw: dict, bad_key: str) -> set:
    """The keys a parser allows, read from its refusal of ``bad_key``
    ("unknown key; expected one of [...]")."""
    with pytest.raises(InputError) as e:
        config.from_dict(raw, "t.toml")
    msg = e.value.line()
    assert bad_key in msg and "unknown key" in msg, msg
    listed = msg.split("expected one of", 1)[1]
    return set(re.findall(r"'([a-z_]+)'", listed))


def _documented(text: str, name: str) -> bool:
    return f"`{name}`" in text


def test_every_section_key_is_documented():
    text = CONFIG_DOC.read_text()
    missing = []
    for section, keys in config.SECTIONS.items():
        if not (f"`[{section}]`" in text or f"`[[{section}]]`" in text):
            missing.append(f"[{section}]")
        for k in keys or ():
            if not _documented(text, f"{section}.{k}"):
                missing.append(f"{section}.{k}")
    for k in config.CUSTOM_KEYS:
        if not _documented(text, f"species.custom.NAME.{k}"):
            missing.append(f"species.custom.NAME.{k}")
    assert not missing, f"config keys missing from docs/config.md: {missing}"


def test_profile_keys_are_documented():
    # the schedule's profile parser keeps its keys to itself: read them from its refusal
    raw = two_ion_config()
    raw["stage"][0]["f_rot"] = {"to": "2 kHz", "bogus": 1}
    keys = _allowed_from_refusal(raw, "stage.spin-up.f_rot.bogus")
    assert {"from", "to", "shape", "points"} <= keys  # the refusal was parsed
    text = CONFIG_DOC.read_text()
    profile = text.split("Profile keys", 1)[1].split("\n## ", 1)[0]
    missing = [k for k in sorted(keys) if not _documented(profile, k)]
    assert not missing, f"profile keys missing from docs/config.md's profile table: {missing}"


def test_noise_keys_are_documented():
    text = CONFIG_DOC.read_text()
    missing = []
    for table, keys in (("field", noise_keys.ENTRY_KEYS), ("multipole", noise_keys.MULTIPOLE_KEYS), ("tone", noise_keys.TONE_KEYS)):
        if f"`[[noise.{table}]]`" not in text:
            missing.append(f"[[noise.{table}]]")
        missing += [f"noise.{table}.{k}" for k in sorted(keys) if not _documented(text, f"noise.{table}.{k}")]
    terms = text.split("PSD terms", 1)[1].split("`[[noise.tone]]`", 1)[0]
    for kind, keys in noise_keys.TERM_KEYS.items():
        if f'`"{kind}"`' not in terms:
            missing.append(f"kind {kind!r}")
        missing += [f"psd term key {k!r}" for k in sorted(keys) if not _documented(terms, k)]
    # the [noise] table's own keys, read from its refusal of an unknown one
    raw = two_ion_config()
    raw["noise"] = {"bogus": {}}
    for k in sorted(_allowed_from_refusal(raw, "noise.bogus")):
        if f"`[[noise.{k}]]`" not in text:
            missing.append(f"[[noise.{k}]]")
    assert not missing, f"noise keys missing from docs/config.md: {missing}"


def test_laser_emission_keys_are_documented():
    raw = two_ion_config()
    raw["laser"] = [{"detuning": "-11 MHz", "saturation": 0.5, "direction": [1, 0, 0],
                     "emission": {"pattern": "linear", "axis": [0, 0, 1], "bogus": 1}}]
    with pytest.raises(InputError) as e:
        config.from_dict(raw, "t.toml")
    allowed = set(re.findall(r"'([a-z_]+)'", e.value.line().split("expected", 1)[1]))
    assert allowed == {"pattern", "axis"}, e.value.line()
    row = next(line for line in CONFIG_DOC.read_text().splitlines() if line.startswith("| `laser.emission`"))
    assert all(f"{k} =" in row for k in allowed), row


# ---------------------------------------------------------------------------
# Links
# ---------------------------------------------------------------------------
LINK = re.compile(r"!?\[[^\]]*\]\(([^)\s]+)\)")
FENCE = re.compile(r"^(```|~~~).*?^\1", re.S | re.M)


def _slug(heading: str) -> str:
    """GitHub's anchor of a heading: lower case, punctuation dropped, spaces to hyphens."""
    s = heading.strip().lower()
    s = re.sub(r"[^\w\- ]", "", s)
    return s.replace(" ", "-")


def _anchors(md: Path) -> set:
    text = FENCE.sub("", md.read_text())
    return {_slug(m.group(1)) for m in re.finditer(r"^#{1,6}\s+(.*)$", text, re.M)}


def _markdown_files():
    return [ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted(DOCS.glob("*.md"))]


def test_slug_rule():
    # GitHub's anchors as they appear on its pages (common practice, no source)
    assert _slug("`mdrotor crystal`") == "mdrotor-crystal"
    assert _slug("On a cluster (Dask; SLURM or PBS via dask-jobqueue)") == "on-a-cluster-dask-slurm-or-pbs-via-dask-jobqueue"


@pytest.mark.parametrize("md", _markdown_files(), ids=lambda p: p.relative_to(ROOT).as_posix())
def test_relative_links_resolve(md):
    text = FENCE.sub("", md.read_text())
    bad = []
    for target in LINK.findall(text):
        if re.match(r"[a-z]+:", target):  # http:, https:, mailto:
            continue
        path, _, anchor = target.partition("#")
        dest = (md.parent / path).resolve() if path else md
        if not dest.exists():
            bad.append(f"{target}: no such file")
        elif anchor and dest.suffix == ".md" and anchor not in _anchors(dest):
            bad.append(f"{target}: no heading with anchor #{anchor}")
    assert not bad, f"{md.name}: broken links {bad}"


def test_readme_links_every_docs_page():
    readme = (ROOT / "README.md").read_text()
    pages = sorted(p.name for p in DOCS.glob("*.md"))
    assert pages, "docs/ has no pages"
    missing = [p for p in pages if f"(docs/{p})" not in readme]
    assert not missing, f"README.md does not link {missing}"


# ---------------------------------------------------------------------------
# Layout files
# ---------------------------------------------------------------------------
def _layout_doc_keys() -> dict:
    """Keys per table in docs/layouts.md's example (commented alternatives
    included): {"layout": {...}, "electrode": {...}, "electrode.sector": {...}, ...}."""
    text = (DOCS / "layouts.md").read_text()
    block = text.split("```toml", 1)[1].split("```", 1)[0]
    keys, table = {"": set()}, ""
    for line in block.splitlines():
        head = re.match(r"^\[+([a-z_]+)\]+", line)
        if head:
            table = head.group(1)
            keys.setdefault(table, set())
            continue
        m = re.match(r"^#?\s*([a-z_]+)\s*=\s*(.*)$", line)
        if not m:
            continue
        keys[table].add(m.group(1))
        inner = re.match(r"^\{([^}]*)\}", m.group(2))
        if inner:
            keys.setdefault(f"{table}.{m.group(1)}", set()).update(re.findall(r"([a-z_]+)\s*=", inner.group(1)))
        keys[table].update(re.findall(r"\(\+ optional ([a-z_]+) =", line))
    keys[""].update(k for k in keys if k and "." not in k)
    return keys


def test_every_layout_key_is_documented():
    # the layout parser's keys, read from its refusals of an unknown key in each table
    import tomllib

    from mdrotor.electrodes.layout import parse_layout

    base = tomllib.loads((ROOT / "configs" / "electrodes" / "ring8_triangle3.toml").read_text())
    shapes = {"rect": {"x": [-10, 10], "y": [-10, 10]}, "sector": {"r_inner": 1, "r_outer": 2, "start": "0 deg",
              "stop": "10 deg"}, "annulus": {"r_inner": 1, "r_outer": 2}, "disc": {"radius": 1}}

    def allowed(edit) -> set:
        data = copy.deepcopy(base)
        edit(data)
        with pytest.raises(InputError) as e:
            parse_layout(data, "l.toml")
        msg = e.value.line()
        assert "bogus" in msg and "unknown key" in msg, msg
        return set(re.findall(r"[a-z_]+", msg.split("expected one of", 1)[1]))

    found = {
        "": allowed(lambda d: d.update(bogus=1)),
        "layout": allowed(lambda d: d["layout"].update(bogus=1)),
        "trap": allowed(lambda d: d.setdefault("trap", {}).update(bogus=1)),
        "rf": allowed(lambda d: d["rf"].update(bogus=1)),
        "design": allowed(lambda d: d.setdefault("design", {"ions": 3, "order": 3, "strength": "1e10 V/m^3"})
                          .update(bogus=1)),
        "electrode": allowed(lambda d: d["electrode"][0].update(bogus=1)),
        "segments": allowed(lambda d: d["segments"][0].update(bogus=1)),
    }
    for shape, value in shapes.items():
        def put(d, shape=shape, value=value):
            el = {"name": "x", "role": "dc", "limit": "1 V", shape: dict(value, bogus=1)}
            d["electrode"] = [el]
        found[f"electrode.{shape}"] = allowed(put)
    documented = _layout_doc_keys()
    missing = [f"{t}.{k}" if t else k for t, ks in found.items() for k in sorted(ks) if k not in documented.get(t, set())]
    assert not missing, f"layout keys missing from docs/layouts.md: {missing}"

