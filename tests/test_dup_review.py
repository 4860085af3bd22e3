"""Many versions of one picture, colourways kept apart, review plans (page API -> CLI -> restore), calibration.

Outside checks and their sources:
- the transformations that make the versions are the kinds used in copy-detection benchmarks (Douze et al.,
  "The 2021 Image Similarity Dataset and Challenge", 2021): JPEG re-encoding, crops, resizing, small
  rotations, colour changes, an added caption or border;
- the pictures are scikit-image's bundled images (`skimage.data`, via conftest.sample_images);
- the colourways are the demo archive's swatches, whose answer key (demo_archive/key.csv) says which motif
  and colourway each is: two colourways of one motif are different designs, not copies;
- byte-for-byte comparisons use Python's hashlib SHA-256 (FIPS 180-4).
"""
from __future__ import annotations

import csv
import hashlib
import io
import json
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner
from PIL import Image, ImageDraw, ImageEnhance, ImageOps

from index.duplicates import calibration as dup_calibration
from index.api import Archive, ArchiveError
from index.cli import main

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "demo_archive"
OTHERS = ("camera", "coffee", "rocket", "coins", "horse", "brick", "hubble_deep_field", "immunohistochemistry")
MOTIFS = ("chevron", "floral", "paisley")


def versions_of(image: Image.Image) -> dict[str, tuple[Image.Image, int]]:
    """Fifteen versions of one picture (name -> image, JPEG quality), standard copy-detection kinds."""
    w, h = image.size
    captioned = image.copy()
    ImageDraw.Draw(captioned).text((w // 20, h - h // 8), "PROOF 12 - not for print", fill=(255, 255, 255))
    return {
        "q75": (image, 75), "q50": (image, 50), "q30": (image, 30), "q15": (image, 15),
        "crop90": (image.crop((w // 20, 0, w, int(h * 0.95))), 90),
        "crop70": (image.crop((0, h // 6, int(w * 0.84), h)), 90),
        "half": (image.resize((w // 2, h // 2), Image.LANCZOS), 90),
        "quarter": (image.resize((w // 4, h // 4), Image.LANCZOS), 90),
        "rot3": (image.rotate(3, Image.BICUBIC, expand=True, fillcolor="white"), 90),
        "rot-5": (image.rotate(-5, Image.BICUBIC, expand=True, fillcolor="white"), 90),
        "bright": (ImageEnhance.Brightness(image).enhance(1.3), 90),
        "contrast": (ImageEnhance.Contrast(image).enhance(0.6), 90),
        "saturated": (ImageEnhance.Color(image).enhance(1.8), 90),
        "caption": (captioned, 90),
        "border": (ImageOps.expand(image, border=min(w, h) // 12, fill=(40, 60, 200)), 90),
    }


def demo_colourways() -> list[dict]:
    with open(DEMO / "key.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(fh) if r["kind"] == "original" and r["motif"] in MOTIFS]
    return rows


@pytest.fixture(scope="module")
def review_archive(tmp_path_factory, sample_images):
    root = tmp_path_factory.mktemp("review") / "archive"
    (root / "astronaut").mkdir(parents=True)
    sample_images["astronaut"].save(root / "astronaut" / "original.png")
    for name, (image, quality) in versions_of(sample_images["astronaut"]).items():
        image.save(root / "astronaut" / f"v-{name}.jpg", "JPEG", quality=quality)
    (root / "others").mkdir()
    for name in OTHERS:
        sample_images[name].save(root / "others" / f"{name}.png")
    swatches = demo_colourways()
    for row in swatches:
        target = root / "swatches" / row["path"]
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(DEMO / row["path"], target)
    db = root.parent / "db"
    with Archive.open(db, create=True, layers=["objects"]) as archive:
        archive.add([root], progress=False)
    return root, db, {str(root / "swatches" / r["path"]): r for r in swatches}


def test_a_picture_with_fifteen_versions_ends_up_in_one_group(review_archive):
    root, db, _ = review_archive
    with Archive.open(db) as archive:
        doc = archive.duplicates()
    astronaut = {str(p) for p in (root / "astronaut").iterdir()}
    assert len(astronaut) == 16
    holding = [g for g in doc["groups"] if astronaut & {m["path"] for m in g["members"]}]
    assert len(holding) == 1, [sorted(m["path"] for m in g["members"]) for g in holding]
    assert {m["path"] for m in holding[0]["members"]} == astronaut


def test_different_colourways_of_one_motif_stay_apart(review_archive):
    _, db, swatches = review_archive
    by_motif = {}
    for row in swatches.values():
        by_motif.setdefault(row["motif"], set()).add(row["colourway"])
    assert all(len(c) >= 2 for c in by_motif.values())  # the set really holds several colourways per motif
    with Archive.open(db) as archive:
        doc = archive.duplicates()
    for g in doc["groups"]:
        designs = {(swatches[m["path"]]["motif"], swatches[m["path"]]["colourway"])
                   for m in g["members"] if m["path"] in swatches}
        assert len(designs) <= 1, designs


def test_the_json_carries_the_calibration_and_the_cli_explains_it(review_archive):
    _, db, _ = review_archive
    out = CliRunner().invoke(main, ["duplicates", "--db", str(db), "-q"])
    doc = json.loads(out.stdout)
    assert doc["calibration"]["threshold"] == doc["threshold"] == dup_calibration.DEFAULT_THRESHOLD
    assert "Douze et al. 2021" in doc["calibration"]["data"] and "precision" in doc["calibration"]["rule"]
    chosen = json.loads(CliRunner().invoke(main, ["duplicates", "--db", str(db), "-q", "--threshold", "0.3"]).stdout)
    assert chosen["calibration"] is None  # a threshold the user gave has no calibration to show
    text = CliRunner().invoke(main, ["duplicates", "--explain-threshold"])
    assert text.exit_code == 0
    assert f"normalised score >= {dup_calibration.DEFAULT_THRESHOLD:g}" in text.output
    assert "data:" in text.output and "rule:" in text.output and "scikit-image" in text.output


# --- plans: what the page sends, the file it exports, the command line that applies it ----------------------
def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def snapshot(root: Path) -> dict:
    return {p.relative_to(root): (sha256(p), p.stat().st_mtime) for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture()
def plan_archive(tmp_path, sample_images):
    root = tmp_path / "archive"
    (root / "a").mkdir(parents=True)
    image = sample_images["chelsea"]
    image.save(root / "a" / "chelsea.png")
    for name, (version, quality) in list(versions_of(image).items())[:5]:
        version.save(root / "a" / f"chelsea-{name}.jpg", "JPEG", quality=quality)
    for name in ("camera", "rocket", "coins"):
        sample_images[name].save(root / "a" / f"{name}.png")
    db = tmp_path / "db"
    with Archive.open(db, create=True, layers=["objects"]) as archive:
        archive.add([root], progress=False)
    return root, db


def page_decisions(doc: dict) -> tuple[dict, dict]:
    """Decisions as the review page sends them: in the chelsea group another keeper, one member marked
    'not a copy', one split off into a group of its own."""
    g = next(g for g in doc["groups"] if g["kind"] == "near")
    ids = [m["id"] for m in g["members"]]
    others = [i for i in ids if i != g["keeper"]]
    new_keeper, not_copy, split = others[0], others[1], others[2]
    main_part = [i for i in ids if i not in (not_copy, split)]
    decisions = {"layer": doc["layer"], "groups": [
        {"id": g["id"], "kind": "near", "keeper": new_keeper, "members": main_part, "excluded": [not_copy]},
        {"id": f"{g['id']}-2", "kind": "near", "keeper": split, "members": [split], "excluded": []}]}
    paths = {m["id"]: m["path"] for m in g["members"]}
    stays = {paths[new_keeper], paths[not_copy], paths[split]}
    moves = {paths[i] for i in main_part if i != new_keeper}
    return decisions, {"stays": stays, "moves": moves}


@pytest.mark.parametrize("fmt", ["json", "csv"])
def test_a_plan_from_the_page_applied_and_restored_gives_back_every_byte(plan_archive, tmp_path, fmt):
    from web import create_app

    root, db = plan_archive
    before = snapshot(root)
    client = create_app({"KINSCOPE_DB": str(db), "TESTING": True}).test_client()
    doc = client.get("/api/duplicates").get_json()
    assert doc["groups"], doc
    decisions, expected = page_decisions(doc)
    response = client.post("/api/duplicates/plan", data={"decisions": json.dumps(decisions), "format": fmt})
    assert response.status_code == 200 and "attachment" in response.headers["Content-Disposition"]
    plan_file = tmp_path / f"plan.{fmt}"
    plan_file.write_bytes(response.data)
    assert snapshot(root) == before  # making a plan moved nothing

    runner, quarantine = CliRunner(), tmp_path / "quarantine"
    dry = runner.invoke(main, ["duplicates", "--db", str(db), "--plan", str(plan_file), "--move-to", str(quarantine), "-q"])
    assert dry.exit_code == 0, dry.output
    assert snapshot(root) == before
    moved = runner.invoke(main, ["duplicates", "--db", str(db), "--plan", str(plan_file), "--move-to", str(quarantine),
                                 "--apply", "-q", "--output", str(tmp_path / "out.json")])
    assert moved.exit_code == 0, moved.output
    report = json.loads((tmp_path / "out.json").read_text())["quarantine"]
    assert {f["original"] for f in report["files"] if f["status"] == "moved"} == expected["moves"]
    assert all(Path(p).exists() for p in expected["stays"])
    restored = runner.invoke(main, ["restore", report["manifest"], "--apply"])
    assert restored.exit_code == 0, restored.output
    assert snapshot(root) == before  # every file back, byte for byte, with its modification time


def test_a_plan_naming_another_file_than_the_catalog_is_refused(plan_archive, tmp_path):
    root, db = plan_archive
    with Archive.open(db) as archive:
        doc = archive.duplicates()
        decisions, _ = page_decisions(doc)
        plan = archive.duplicate_plan(decisions)
    plan["groups"][0]["members"][0]["path"] = str(root / "a" / "camera.png")
    edited = tmp_path / "edited.json"
    edited.write_text(json.dumps(plan))
    out = CliRunner().invoke(main, ["duplicates", "--db", str(db), "--plan", str(edited), "--move-to",
                                    str(tmp_path / "q"), "--apply"])
    assert out.exit_code == 2 and "kinscope: " in out.output and "in the catalog but" in out.output
    assert "Traceback" not in out.output and not (tmp_path / "q").exists()


@pytest.mark.parametrize("decisions, message", [
    ({"groups": [{"id": 1, "keeper": 5, "members": [1, 2]}]}, "keeper must be one of its members"),
    ({"groups": [{"id": 1, "keeper": 1, "members": [1, 2], "excluded": [2]}]}, "both a member"),
    ({"groups": [{"id": 1, "keeper": 1, "members": [1, 1]}]}, "names an item twice"),
    ({"groups": [{"id": 1, "keeper": 999999, "members": [999999]}]}, "no indexed item"),
    ({"groups": "all"}, "list of groups"),
])
def test_bad_decisions_get_a_plain_message(plan_archive, decisions, message):
    _, db = plan_archive
    with Archive.open(db) as archive, pytest.raises(ArchiveError, match=message):
        archive.duplicate_plan(decisions)


def test_plan_route_rejects_bad_input_with_400(plan_archive):
    from web import create_app

    _, db = plan_archive
    client = create_app({"KINSCOPE_DB": str(db), "TESTING": True}).test_client()
    for data in ({"decisions": "{not json"}, {"decisions": "{}"}, {"decisions": "{}", "format": "xml"}, {}):
        r = client.post("/api/duplicates/plan", data=data)
        assert r.status_code == 400 and r.get_json()["error"], data
    assert client.get("/api/duplicates?threshold=abc").status_code == 400
    csv_plan = io.StringIO(client.post("/api/duplicates/plan", data={
        "decisions": json.dumps({"groups": []}), "format": "csv"}).get_data(as_text=True))
    assert next(csv.reader(csv_plan)) == ["group", "kind", "decision", "id", "path", "size", "sha256", "keeper_reason"]
