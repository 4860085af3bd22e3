"""Duplicate detection: exact and near groups, the keeper rule, the outputs, quarantine and restore.

Images are scikit-image's bundled photographs and scans (`skimage.data`, via conftest.sample_images);
the near copies are made here with transformations of the kinds used in copy-detection benchmarks
(JPEG re-encoding, crops, resizing, brightness shifts; Douze et al., "The 2021 Image Similarity
Dataset and Challenge", 2021).
"""
from __future__ import annotations

import base64
import csv
import hashlib
import io
import json
import os
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image, ImageEnhance

from index.duplicates import groups as dup
from index.api import Archive, ArchiveError
from index.cli import main
from index.model.pooling import l2_normalize

ORIGINALS = ("astronaut", "camera", "coffee", "chelsea", "rocket", "coins", "horse", "brick", "hubble_deep_field",
             "immunohistochemistry")
T0 = 1_700_000_000.0  # modification times are set explicitly so the keeper rule is testable


def sha256(path) -> str:
    # Reference: Python's hashlib (FIPS 180-4 SHA-256), independent of kinscope's own hashing.
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def crop_resize_jpeg(image: Image.Image) -> bytes:
    """Keep 90% of the area (off centre), halve the size, JPEG quality 75."""
    w, h = image.size
    cw, ch = int(w * 0.95), int(h * 0.95)
    small = image.crop((w - cw, 0, w, ch)).resize((cw // 2, ch // 2), Image.LANCZOS)
    buf = io.BytesIO()
    small.save(buf, "JPEG", quality=75)
    return buf.getvalue()


def brighter_jpeg(image: Image.Image) -> bytes:
    buf = io.BytesIO()
    ImageEnhance.Brightness(image).enhance(1.3).save(buf, "JPEG", quality=90)
    return buf.getvalue()


def make_folder(root, sample_images, names=ORIGINALS):
    """Originals as PNG, one exact byte copy (coffee), two near copies (astronaut, chelsea)."""
    (root / "scans").mkdir(parents=True)
    (root / "exports" / "web").mkdir(parents=True)
    for n, name in enumerate(names):
        path = root / "scans" / f"{name}.png"
        sample_images[name].save(path)
        os.utime(path, (T0 + n, T0 + n))
    copies = {
        root / "exports" / "coffee-copy.png": (root / "scans" / "coffee.png").read_bytes(),
        root / "exports" / "web" / "astronaut-small.jpg": crop_resize_jpeg(sample_images["astronaut"]),
        root / "exports" / "chelsea-bright.jpg": brighter_jpeg(sample_images["chelsea"]),
    }
    for path, data in copies.items():
        path.write_bytes(data)
        os.utime(path, (T0 + 100, T0 + 100))
    # the byte copy is older than its original: the keeper rule must pick it (same pixels, oldest time)
    os.utime(root / "exports" / "coffee-copy.png", (T0 - 50, T0 - 50))
    return root


def source_of(path: str) -> str:
    base = os.path.basename(path).split(".")[0]
    return base.split("-")[0]


@pytest.fixture(scope="module")
def dup_archive(tmp_path_factory, sample_images):
    root = make_folder(tmp_path_factory.mktemp("dups") / "archive", sample_images)
    db = root.parent / "db"
    archive = Archive.open(db, create=True, layers=["objects"])
    archive.add([root], progress=False)
    return archive, root, db


def groups_by_kind(doc, kind):
    return [g for g in doc["groups"] if g["kind"] == kind]


# --- the main job -------------------------------------------------------------------------------------
def test_exact_copies_form_one_exact_group(dup_archive):
    archive, root, _ = dup_archive
    doc = archive.duplicates()
    exact = groups_by_kind(doc, "exact")
    assert len(exact) == 1
    paths = sorted(m["path"] for m in exact[0]["members"])
    assert paths == sorted([str(root / "exports" / "coffee-copy.png"), str(root / "scans" / "coffee.png")])
    assert len({sha256(p) for p in paths}) == 1  # byte-identical by an independent hash


def test_near_duplicate_transforms_are_grouped_with_their_originals(dup_archive):
    archive, root, _ = dup_archive
    doc = archive.duplicates()
    near = [sorted(os.path.basename(m["path"]) for m in g["members"]) for g in groups_by_kind(doc, "near")]
    assert ["astronaut-small.jpg", "astronaut.png"] in near
    assert ["chelsea-bright.jpg", "chelsea.png"] in near


def test_different_images_are_not_grouped(dup_archive):
    # Source: scikit-image's bundled images are distinct photographs and scans; none is a copy of another.
    archive, _, _ = dup_archive
    doc = archive.duplicates()
    for g in doc["groups"]:
        assert len({source_of(m["path"]) for m in g["members"]}) == 1, g["members"]
    assert doc["counts"]["images_in_groups"] == 6


def test_keeper_rule_in_the_archive(dup_archive):
    archive, root, _ = dup_archive
    doc = archive.duplicates()
    for g in doc["groups"]:
        keeper = next(m for m in g["members"] if m["id"] == g["keeper"])
        if g["kind"] == "exact":  # same bytes; the copy in exports/ has the older modification time
            assert keeper["path"] == str(root / "exports" / "coffee-copy.png")
            assert g["keeper_reason"] == "equal on the picture's evidence; oldest modification time"
        elif source_of(keeper["path"]) == "astronaut":  # the original has four times the pixels and the detail
            assert keeper["path"] == str(root / "scans" / "astronaut.png")
            assert g["keeper_reason"].startswith("largest effective resolution (262,144 pixels of picture against")
        else:  # chelsea: same size, but the copy was brightened and saved as JPEG quality 90; the original is PNG
            assert keeper["path"] == str(root / "scans" / "chelsea.png")
            assert "lighter compression (quality 100 against 90)" in g["keeper_reason"]
        assert all("evidence" in m and m["evidence"]["eligible"] for m in g["members"])
    assert doc["rules"]["keeper"] == dup.KEEPER_RULE and "--prefer" in doc["rules"]["keeper"]


def test_prefer_folders_decide_the_keeper_from_the_command_line(dup_archive):
    archive, root, db = dup_archive
    res = CliRunner().invoke(main, ["duplicates", "--db", str(db), "-q", "--prefer", str(root / "exports" / "web")])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    astronaut = next(g for g in doc["groups"] if source_of(g["members"][0]["path"]) == "astronaut")
    keeper = next(m for m in astronaut["members"] if m["id"] == astronaut["keeper"])
    assert keeper["path"] == str(root / "exports" / "web" / "astronaut-small.jpg")  # the user's word wins
    assert astronaut["keeper_reason"] == "in a folder given with --prefer"
    assert doc["rules"]["keeper"].endswith(f"Preferred folders: {root / 'exports' / 'web'}.")


def test_member_scores_and_pairs_are_cosines_of_the_stored_descriptors(dup_archive):
    # Reference: numpy dot products of the stored L2-normalised descriptors (cosine similarity).
    archive, _, _ = dup_archive
    doc = archive.duplicates()
    ids, vectors = dup.all_vectors(archive.store("objects"))
    by_id = dict(zip(ids.tolist(), vectors))
    for g in groups_by_kind(doc, "near"):
        for p in g["pairs"]:
            assert p["cosine"] == pytest.approx(float(by_id[p["a"]] @ by_id[p["b"]]), abs=1e-3)
            assert p["score"] >= doc["threshold"] - 1e-3 or g["centre"] not in (p["a"], p["b"])


# --- outputs ---------------------------------------------------------------------------------------------
def test_json_output_has_the_documented_shape_and_matches_the_python_api(dup_archive):
    archive, _, db = dup_archive
    out = CliRunner().invoke(main, ["duplicates", "--db", str(db), "-q"])
    assert out.exit_code == 0, out.output
    doc = json.loads(out.stdout)
    assert doc["rules"]["keeper"] and doc["threshold"] == dup.DEFAULT_THRESHOLD and doc["layer"] == "objects"
    for g in doc["groups"]:
        assert {"id", "kind", "keeper", "members"} <= set(g) and g["kind"] in ("exact", "near")
        assert g["keeper"] in [m["id"] for m in g["members"]]
        assert all({"id", "path", "score"} <= set(m) for m in g["members"])
    api = archive.duplicates()
    assert [(g["kind"], g["keeper"], [m["id"] for m in g["members"]]) for g in api["groups"]] == \
           [(g["kind"], g["keeper"], [m["id"] for m in g["members"]]) for g in doc["groups"]]


def test_csv_output_has_one_row_per_member_with_its_group(dup_archive, tmp_path):
    archive, _, db = dup_archive
    target = tmp_path / "groups.csv"
    out = CliRunner().invoke(main, ["duplicates", "--db", str(db), "--format", "csv", "--output", str(target)])
    assert out.exit_code == 0, out.output
    raw = target.read_bytes()
    # RFC 4180, section 2: each record ends with CRLF (and no bare LF ends one).
    assert raw.endswith(b"\r\n") and raw.count(b"\n") == raw.count(b"\r\n")
    rows = list(csv.DictReader(open(target, newline="")))  # read back by Python's csv module
    doc = archive.duplicates()
    assert len(rows) == sum(len(g["members"]) for g in doc["groups"])
    for g in doc["groups"]:
        mine = [r for r in rows if int(r["group"]) == g["id"]]
        assert sorted(int(r["id"]) for r in mine) == sorted(m["id"] for m in g["members"])
        assert [int(r["id"]) for r in mine if r["keeper"] == "1"] == [g["keeper"]]
        assert {r["kind"] for r in mine} == {g["kind"]}
    assert "groups" in out.output and "keeper" in out.output  # the summary names the keeper rule


def test_exit_status_is_zero_when_nothing_near_is_found(dup_archive):
    _, _, db = dup_archive
    out = CliRunner().invoke(main, ["duplicates", "--db", str(db), "--threshold", "2", "-q"])
    assert out.exit_code == 0, out.output
    assert {g["kind"] for g in json.loads(out.stdout)["groups"]} == {"exact"}


def test_errors_are_one_line_with_status_two(dup_archive, tmp_path):
    _, root, db = dup_archive
    runner = CliRunner()
    for args, text in [
        (["duplicates", "--db", str(db), "--layer", "nonexistent"], "no layer"),
        (["duplicates", "--db", str(db), "--apply"], "--apply only goes with --move-to"),
        (["duplicates", "--db", str(db), "--cosine"], "give --threshold"),
        (["duplicates", "--db", str(db), "--move-to", str(root / "quarantine")], "outside the indexed folder"),
        (["duplicates", "--db", str(tmp_path)], "not a kinscope database"),
    ]:
        out = runner.invoke(main, args)
        assert out.exit_code == 2, (args, out.output)
        assert "kinscope: " in out.output and text in out.output and "Traceback" not in out.output
    assert not (root / "quarantine").exists()


def test_html_report_is_a_static_page_with_thumbnails_and_cautions(dup_archive, tmp_path):
    _, _, db = dup_archive
    page = tmp_path / "review.html"
    out = CliRunner().invoke(main, ["duplicates", "--db", str(db), "--report", str(page), "-q"])
    assert out.exit_code == 0, out.output
    html = page.read_text()
    assert page.stat().st_mode & 0o077 == 0  # readable by its owner only: it shows the archive
    assert "not a verdict" in html and "Nothing has been moved or deleted" in html
    assert "as private as the archive" in html and "restore MANIFEST" in html
    doc = json.loads(out.stdout)
    for g in doc["groups"]:  # the reason the file stays, in words, and the kind in plain words
        assert f"<p class='decision'>stays: {g['keeper_reason']}</p>" in html.replace("&#x27;", "'")
        kind = {"exact": "same bytes", "near": "look-alike"}[g["kind"]]
        assert f"Group {g['id']} <span class='kind'>&middot; {kind} &middot;" in html
    paths = [m["path"] for g in doc["groups"] for m in g["members"]]
    assert len(set(paths)) == len(paths)  # no file in two groups here, so every non-keeper would move
    assert html.count("<p class='decision'>would move") == len(paths) - len(doc["groups"])
    assert "http://" not in html and "https://" not in html  # nothing to fetch: opens without a server
    uris = html.split('src="data:image/jpeg;base64,')[1:]
    assert len(uris) == sum(len(g["members"]) for g in doc["groups"])  # one per card
    thumb = Image.open(io.BytesIO(base64.b64decode(uris[0].split('"')[0])))
    assert thumb.format == "JPEG" and max(thumb.size) <= 180


# --- quarantine and restore ---------------------------------------------------------------------------
@pytest.fixture()
def small_archive(tmp_path, sample_images):
    root = make_folder(tmp_path / "archive", sample_images, names=("astronaut", "coffee", "camera", "chelsea"))
    db = tmp_path / "db"
    with Archive.open(db, create=True, layers=["objects"]) as archive:
        archive.add([root], progress=False)
    return root, db


def snapshot(root):
    return {p.relative_to(root): (p.read_bytes(), sha256(p), p.stat().st_mtime)
            for p in sorted(root.rglob("*")) if p.is_file()}


def test_move_and_restore_round_trip_leaves_every_file_byte_identical(small_archive, tmp_path):
    root, db = small_archive
    before = snapshot(root)
    quarantine = tmp_path / "quarantine"
    runner = CliRunner()

    dry = runner.invoke(main, ["duplicates", "--db", str(db), "--move-to", str(quarantine), "-q"])
    assert dry.exit_code == 0, dry.output
    assert snapshot(root) == before and not quarantine.exists()  # a dry run touches nothing
    planned = json.loads(dry.stdout)["quarantine"]["files"]
    assert len(planned) == 3 and all(f["status"] == "planned" for f in planned)

    moved = runner.invoke(main, ["duplicates", "--db", str(db), "--move-to", str(quarantine), "--apply", "-q"])
    assert moved.exit_code == 0, moved.output
    report = json.loads(moved.stdout)["quarantine"]
    manifest = json.loads(open(report["manifest"]).read())
    assert [f["status"] for f in manifest["files"]] == ["moved"] * 3
    for f in manifest["files"]:
        assert not os.path.exists(f["original"]) and os.path.isfile(f["quarantined"])
        rel = os.path.relpath(f["original"], root)
        assert f["quarantined"] == str(quarantine / rel)  # relative paths below the common root are kept
        assert f["sha256"] == before[Path(rel)][1] and f["size"] == len(before[Path(rel)][0])
    kept = snapshot(root)
    assert len(kept) == len(before) - 3 and all(before[k] == v for k, v in kept.items())

    dry_restore = runner.invoke(main, ["restore", report["manifest"]])
    assert dry_restore.exit_code == 0 and "would restore" in dry_restore.output
    assert snapshot(root) == kept
    restored = runner.invoke(main, ["restore", report["manifest"], "--apply"])
    assert restored.exit_code == 0, restored.output
    assert snapshot(root) == before  # every file back, byte-identical, with its modification time
    # what is left in the quarantine: the manifest and its journal of the moves
    journal = report["manifest"][:-len(".json")] + ".journal"
    assert sorted(p.name for p in quarantine.rglob("*") if p.is_file()) == sorted(
        [os.path.basename(report["manifest"]), os.path.basename(journal)])
    again = runner.invoke(main, ["restore", report["manifest"], "--apply"])
    assert again.exit_code == 0 and again.output.count("already in place") == 3


def test_restore_never_overwrites_and_checks_the_hash(small_archive, tmp_path):
    root, db = small_archive
    quarantine = tmp_path / "q"
    runner = CliRunner()
    out = runner.invoke(main, ["duplicates", "--db", str(db), "--move-to", str(quarantine), "--apply",
                               "--output", str(tmp_path / "groups.json"), "-q"])
    assert out.exit_code == 0, out.output
    report = json.loads((tmp_path / "groups.json").read_text())["quarantine"]
    first, second = report["files"][0], report["files"][1]
    open(first["original"], "wb").write(b"a new file took its place")
    open(second["quarantined"], "ab").write(b"tampered")
    res = runner.invoke(main, ["restore", report["manifest"], "--apply"])
    assert res.exit_code == 2 and "2 of 3 files could not be restored" in res.output
    assert open(first["original"], "rb").read() == b"a new file took its place"
    assert os.path.isfile(first["quarantined"]) and os.path.isfile(second["quarantined"])
    assert not os.path.exists(second["original"])


# --- the pieces: search, background, grouping -----------------------------------------------------------
def planted(n: int, d: int, copies: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    base = l2_normalize(np.maximum(rng.normal(size=(n, d)) + 0.5, 0))
    src = rng.choice(n, copies, replace=False)
    strength = rng.uniform(0.2, 0.5, (copies, 1))  # cosine to the source from about 0.98 down to 0.89
    near = l2_normalize(base[src] + strength * rng.normal(size=(copies, d)) / np.sqrt(d))
    return np.vstack([base, near]).astype(np.float32), src


def brute_force_pairs(x: np.ndarray, t: float) -> set[tuple[int, int]]:
    # Reference: numpy brute force over every pair (x @ x.T), no FAISS.
    s = x @ x.T
    i, j = np.nonzero(np.triu(s >= t, 1))
    return set(zip(i.tolist(), j.tolist()))


def test_exact_candidate_search_equals_numpy_brute_force():
    x, _ = planted(800, 48, 80)
    a, b, s, c = dup.candidate_pairs(x, 0.9)
    assert set(zip(a.tolist(), b.tolist())) == brute_force_pairs(x, 0.9)
    assert np.allclose(c, np.einsum("nd,nd->n", x[a], x[b]), atol=1e-5)


def test_approximate_search_finds_what_exact_search_finds():
    # The IVF path (forced with exact_max=0) against numpy brute force on 11 000 vectors.
    x, _ = planted(11_000, 96, 1000, seed=1)
    truth = brute_force_pairs(x, 0.9)
    a, b, s, c = dup.candidate_pairs(x, 0.9, exact_max=0)
    found = set(zip(a.tolist(), b.tolist()))
    assert len(truth) >= 700
    assert found <= truth  # every reported pair is exact: rescored in the full space
    assert len(found & truth) / len(truth) >= 0.98


def test_star_groups_do_not_chain_a_series_of_links():
    # A path A-B-C-D-E-F: each image links only to the next. Connected components would put all six
    # in one group; star groups keep every member one link from its centre.
    i, j = np.arange(5), np.arange(1, 6)
    groups = dup.star_groups(6, i, j, np.full(5, 0.5, np.float32))
    edges = set(zip(i.tolist(), j.tolist())) | set(zip(j.tolist(), i.tolist()))
    for centre, members in groups:
        assert all(m == centre or (centre, m) in edges for m in members.tolist())
        assert len(members) <= 3
    assert not any({0, 5} <= set(m.tolist()) for _, m in groups)


def reference_background(x: np.ndarray, rank: int, excluded: set[tuple[int, int]] = frozenset(),
                         cap: float | None = None) -> np.ndarray:
    # Reference: numpy sort and median over every row of x @ x.T (the whole set is the sample here), with the
    # item itself and its excluded partners replaced by the row's median, as docs/duplicates.md defines it.
    s = x @ x.T
    out = np.empty(len(x))
    for i in range(len(x)):
        row = s[i].copy()
        drop = [i] + [j for j in range(len(x)) if (i, j) in excluded or (j, i) in excluded]
        row[drop] = np.median(row)
        top = np.sort(row)[-rank]
        med = np.median(row)
        # 1.4826 = 1 / Phi^-1(3/4): scales the MAD to a standard deviation for normal data (Rousseeuw
        # and Croux, JASA 1993; from memory).
        mad = 1.4826 * np.median(np.abs(row - med))
        out[i] = top if cap is None else min(top, med + cap * mad)
    return out


def test_background_matches_a_numpy_reference():
    rng = np.random.default_rng(3)
    x = l2_normalize(np.abs(rng.normal(size=(200, 32)))).astype(np.float32)
    assert np.allclose(dup.background(x), reference_background(x, dup.BACKGROUND_RANK), atol=1e-5)
    excluded = {(0, 5), (7, 0), (3, 4)}
    got = dup.background(x, exclude=(np.array([0, 7, 3]), np.array([5, 0, 4])))
    assert np.allclose(got, reference_background(x, dup.BACKGROUND_RANK, excluded), atol=1e-5)
    capped = dup.background(x, ceiling_mads=2.0)  # the optional cap: median + 2 MAD
    assert np.allclose(capped, reference_background(x, dup.BACKGROUND_RANK, cap=2.0), atol=1e-5)


def test_the_local_background_is_the_kth_nearest_cosine():
    # Reference: numpy sort of each row of x @ x.T (the k-th most similar other row), exact search path; the
    # approximate path (projection) must come close to it.
    x, _ = planted(3000, 48, 300, seed=5)
    s = x @ x.T
    np.fill_diagonal(s, -np.inf)
    truth = np.sort(s, axis=1)[:, -5]
    exact = dup.candidate_pairs(x, 0.9, kth=5)[4]
    assert np.allclose(exact, truth, atol=1e-5)
    approx = dup.candidate_pairs(x, 0.9, kth=5, exact_max=0)[4]
    assert np.median(np.abs(approx - truth)) < 0.02


def many_copies(n_other: int = 270, copies: int = 30, seed: int = 4):
    rng = np.random.default_rng(seed)
    x = l2_normalize(np.maximum(rng.normal(size=(n_other, 640)) + 0.3, 0))  # non-negative, like GeM descriptors
    strength = rng.uniform(0.3, 0.6, (copies, 1))  # cosine to the original from about 0.95 down to 0.85
    near = l2_normalize(np.maximum(x[0] + strength * rng.normal(size=(copies, 640)) / np.sqrt(640), 0))
    return np.vstack([x, near]).astype(np.float32)


def test_an_items_own_copies_do_not_lift_its_background():
    # Thirty copies of one item in a set of 300: its 10th most similar item is a copy, so the plain rank
    # statistic sits at the copies' level. The screened background leaves the copies out and comes back to
    # the level of an unrelated item's background.
    x = many_copies()
    copy_cos = x[270:] @ x[0]
    plain = dup.background(x, ceiling_mads=np.inf)
    assert plain[0] >= np.sort(copy_cos)[0]  # the unscreened rank statistic is a copy
    a, b, _, cos, local = dup.candidate_pairs(x, 0.0, min_cosine=0.0, kth=dup.LOCAL_RANK)
    bg, n_copies = dup.screened(x, a, b, cos, local)
    assert n_copies >= 30 * 31 // 2 * 0.9  # (almost) every pair among the 31 versions was screened
    others = bg[1:270]
    assert bg[0] <= np.quantile(others, 0.95) + 0.02
    assert (dup.normalise(copy_cos, np.full(30, bg[0]), bg[270:]) >= dup.DEFAULT_THRESHOLD).all()


def test_thirty_one_versions_form_one_group():
    x = many_copies()
    ids = np.arange(100, 100 + len(x))
    rows = [{"path": f"/a/{n:03d}.jpg", "width": 10, "height": 10, "mtime": 0.0} for n in range(len(x))]
    doc = dup.find(ids, x, rows, min_cosine=0.5)
    near = [g for g in doc["groups"] if g["kind"] == "near"]
    assert len(near) == 1
    assert sorted(m["id"] for m in near[0]["members"]) == [100] + list(range(370, 400))


def test_second_links_join_an_item_linked_to_two_members_but_not_one():
    # Star from 0 over 1, 2, 3 (the most edges); item 4 has edges to members 1 and 2, item 5 to member 3 only.
    i = np.array([0, 0, 0, 1, 2, 3])
    j = np.array([1, 2, 3, 4, 4, 5])
    s = np.full(6, 0.5, np.float32)
    groups = dup.near_groups(6, i, j, s)
    assert [sorted(m.tolist()) for _, m in groups] == [[0, 1, 2, 3, 4]]
    assert [sorted(m.tolist()) for _, m in dup.star_groups(6, i, j, s)] == [[0, 1, 2, 3]]


def test_the_loose_band_joins_an_item_with_two_weak_links_but_not_one():
    # Star from 0 over 1, 2, 3 at the threshold 0.24. Item 4 scores 0.15 (in the band from 0.12) against members
    # 1 and 2; item 5 scores 0.20 against member 3 only; item 6 scores 0.10 (below the band) against 1 and 2.
    i = np.array([0, 0, 0, 1, 2, 3, 1, 2])
    j = np.array([1, 2, 3, 4, 4, 5, 6, 6])
    s = np.array([0.5, 0.5, 0.5, 0.15, 0.15, 0.20, 0.10, 0.10], np.float32)
    band = dup.loose_threshold(0.24)
    assert band == pytest.approx(0.12)
    groups = dup.near_groups(7, i, j, s, threshold=0.24, loose=band, loose_links=dup.LOOSE_LINKS)
    assert [sorted(m.tolist()) for _, m in groups] == [[0, 1, 2, 3, 4]]
    without = dup.near_groups(7, i, j, s, threshold=0.24)
    assert [sorted(m.tolist()) for _, m in without] == [[0, 1, 2, 3]]


def test_the_loose_band_never_starts_a_group():
    # Weak links alone (every score in the band, none at the threshold) make no group: the band only adds
    # items to groups that strong links formed.
    i, j = np.array([0, 0, 1]), np.array([1, 2, 2])
    s = np.full(3, 0.2, np.float32)
    assert dup.near_groups(3, i, j, s, threshold=0.24, loose=0.12, loose_links=2) == []


def test_layers_without_a_calibrated_threshold_need_one(dup_archive):
    archive, _, _ = dup_archive
    with pytest.raises(ArchiveError, match="give --threshold"):
        archive.duplicates(normalised=False)
    assert archive.duplicates(normalised=False, threshold=0.999)["score"] == "cosine"
