"""A synthetic study output folder for the report tests and benchmark.

It writes what ``explore run`` writes (tables as NAME.parquet and NAME.csv with
the columns listed in DEVELOPERS.md "Output folder", plus run.json), from
generated images and made-up numbers: no model is involved. Brands are
fictional. ``hostile=True`` puts markup into every user-provided string (file
names, folder names, brand, attribute, context and survey texts) to test the
report's escaping.
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

HOSTILE_FILE = "<img src=x onerror=alert(1)>.jpg"
HOSTILE_BRAND = "</script><script>alert(1)</script>"
HOSTILE_ATTRIBUTE = "<b onmouseover=alert(1)>bold</b>"
HOSTILE_PROMPT = '"><svg onload=alert(1)>'
HOSTILE_CONTEXT = "<iframe src=javascript:alert(1)>"
HOSTILE_FOLDER = "<u>folder</u>"
FORMULA_BRAND = "=Cinder Gear"  # a spreadsheet would run it as a formula (OWASP "CSV Injection")

ENCODER_ID = "bundled-v1-efficientnet_lite0-minilm-l6-v2-test"


def _wilson(k, n, z=1.959963984540054):
    # Wilson, 1927 (score interval); only used to fill the synthetic table.
    if n == 0:
        return 0.0, 0.0
    p = k / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return max(0.0, centre - half), min(1.0, centre + half)


def make_output_folder(
    folder: Path,
    n_images: int = 120,
    *,
    hostile: bool = False,
    seed: int = 0,
    image_px: int = 40,
    with_compare: bool = True,
    with_contexts: bool = True,
    with_attributes: bool = True,
    textured: bool = False,
    thumbnail_px: int = 96,
    max_thumbnails: int | None = None,
) -> Path:
    """Write a synthetic output folder (and its images under ``folder/images``)."""
    from PIL import Image, ImageDraw

    rng = np.random.default_rng(seed)
    folder = Path(folder)
    out = folder / "out"
    root = folder / ("images_" + (HOSTILE_FOLDER if hostile else "root"))
    out.mkdir(parents=True, exist_ok=True)

    brands = {"Alder Fizz": "drinks", "Brook Cola": "drinks", "Cinder Gear": "outdoor", "Dune Trek": "outdoor"}
    if hostile:
        brands = {HOSTILE_BRAND: "drinks", "Brook Cola": "drinks", FORMULA_BRAND: "outdoor", "Dune Trek": "outdoor"}
    brand_names = list(brands)
    contexts = ["beach picnic", "mountain trail", "kitchen table", "night party", "city commute"]
    if hostile:
        contexts[0] = HOSTILE_CONTEXT
    attributes = ["rugged", "glamorous", "playful"]
    if hostile:
        attributes[0] = HOSTILE_ATTRIBUTE
    palette = [(214, 160, 60), (70, 130, 90), (190, 90, 70), (60, 70, 150), (120, 120, 120)]
    centres = rng.normal(0, 6, size=(len(contexts), 2))

    rows = []
    for i in range(n_images):
        b = brand_names[i % len(brand_names)]
        source = "consumer" if (i // len(brand_names)) % 3 else "owned"
        c = int(rng.integers(len(contexts))) if rng.random() > 0.08 else -1
        name = f"photo_{i:05d}.jpg"
        if hostile and i == 0:
            name = HOSTILE_FILE
        rel = Path(b.replace("/", "_")) / source / name
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        colour = palette[c] if c >= 0 else (200, 200, 200)
        im = Image.new("RGB", (image_px, int(image_px * 0.75)), colour)
        draw = ImageDraw.Draw(im)
        x0, y0 = int(rng.integers(0, image_px // 2)), int(rng.integers(0, image_px // 3))
        draw.ellipse([x0, y0, x0 + image_px // 3, y0 + image_px // 3], fill=(250, 250, 240))
        if textured:
            # Photo-like detail (shapes and grain) so JPEG sizes resemble real photos more than flat colour.
            for _ in range(12):
                p0, p1 = rng.integers(0, image_px, size=2), rng.integers(0, image_px, size=2)
                draw.line([tuple(p0), tuple(p1)], fill=tuple(int(v) for v in rng.integers(0, 255, size=3)), width=int(rng.integers(1, 6)))
            grain = rng.integers(0, 24, size=(im.height, im.width, 3), dtype=np.uint8)
            im = Image.fromarray(np.asarray(im, dtype=np.uint8) // 8 * 7 + grain)
        im.save(path, "JPEG", quality=80)
        data = path.read_bytes()
        rows.append(
            dict(
                image_id=hashlib.sha1(str(rel).encode()).hexdigest()[:12],
                path=str(path),
                relpath=str(rel),
                brand=b,
                category=brands[b],
                source=source,
                posted_at="",
                sha256=hashlib.sha256(data).hexdigest(),
                width=im.width,
                height=im.height,
                status="ok",
                reason="",
                duplicate_of="",
                near_duplicate_of="",
                _context=c,
            )
        )
    images = pd.DataFrame(rows)
    contexts_of = images.pop("_context").to_numpy()
    # Two skipped files: a duplicate and a file that is not an image.
    skipped = pd.DataFrame(
        [
            dict(
                images.iloc[0].to_dict(),
                image_id="dup000000001",
                relpath=str(Path(brand_names[0]) / "consumer" / "copy of photo.jpg"),
                status="duplicate",
                reason="same content as " + images.iloc[0]["relpath"],
                duplicate_of=images.iloc[0]["image_id"],
            ),
            dict(
                images.iloc[1].to_dict(),
                image_id="bad000000001",
                relpath=str(Path(brand_names[1]) / "owned" / ("notes <b>x</b>.jpg" if hostile else "notes.jpg")),
                sha256="",
                width=0,
                height=0,
                status="not_image",
                reason="not an image file (cannot be decoded)",
            ),
        ]
    )
    all_images = pd.concat([images, skipped], ignore_index=True)
    tables: dict[str, pd.DataFrame] = {"images": all_images, "skipped": skipped}

    n = len(images)
    usable = images
    if with_attributes:
        long = []
        for a_i, attr in enumerate(attributes):
            effect = np.array([brand_names.index(b) for b in usable["brand"]]) * 0.15 * (1 if a_i % 2 else -1)
            prob = 1 / (1 + np.exp(-(rng.normal(0, 1.2, size=n) + effect)))
            long.append(
                pd.DataFrame(
                    dict(image_id=usable["image_id"], attribute=attr, probability=prob, positive=prob >= 0.5)
                )
            )
        image_attributes = pd.concat(long, ignore_index=True)
        tables["image_attributes"] = image_attributes
        tables["attribute_definitions"] = pd.DataFrame(
            dict(
                attribute=attributes,
                positive_descriptions=[HOSTILE_PROMPT if hostile and k == 0 else f"{a} and bold" for k, a in enumerate(attributes)],
                negative_descriptions=[f"not {a}" for a in attributes],
                positive_prompts=[(HOSTILE_PROMPT if hostile and k == 0 else f"{a} and bold") + " | a photo that feels " + a for k, a in enumerate(attributes)],
                negative_prompts=[f"not {a} | a photo that feels not {a}" for a in attributes],
                threshold=0.5,
                threshold_from="study",
                scored_by="zero-shot",
                encoder_id=ENCODER_ID,
            )
        )
        merged = image_attributes.merge(usable[["image_id", "brand", "category", "source"]], on="image_id")
        share_rows = []
        for (attr, brand, source), g in pd.concat(
            [merged, merged.assign(source="all")]
        ).groupby(["attribute", "brand", "source"]):
            k, m = int(g["positive"].sum()), len(g)
            lo, hi = _wilson(k, m)
            mp = float(g["probability"].mean())
            share_rows.append(
                dict(level="brand", brand=brand, category=brands[brand], source=source, attribute=attr, n=m,
                     positives=k, yes_rate=k / m, yes_rate_low=lo, yes_rate_high=hi, mean_probability=mp,
                     mean_low=mp - 0.03, mean_high=mp + 0.03, threshold=0.5, encoder_id=ENCODER_ID)
            )
        for (attr, cat, source), g in pd.concat([merged, merged.assign(source="all")]).groupby(
            ["attribute", "category", "source"]
        ):
            k, m = int(g["positive"].sum()), len(g)
            lo, hi = _wilson(k, m)
            mp = float(g["probability"].mean())
            share_rows.append(
                dict(level="category", brand="", category=cat, source=source, attribute=attr, n=m,
                     positives=k, yes_rate=k / m, yes_rate_low=lo, yes_rate_high=hi, mean_probability=mp,
                     mean_low=mp - 0.03, mean_high=mp + 0.03, threshold=0.5, encoder_id=ENCODER_ID)
            )
        shares = pd.DataFrame(share_rows)
        tables["attribute_shares"] = shares
        gap_rows = []
        for (brand, attr), g in shares[(shares.level == "brand") & (shares.source != "all")].groupby(["brand", "attribute"]):
            s = dict(zip(g["source"], g["yes_rate"]))
            if {"consumer", "owned"} <= set(s):
                gap = s["consumer"] - s["owned"]
                gap_rows.append(
                    dict(brand=brand, category=brands[brand], attribute=attr, consumer_n=20, owned_n=10,
                         consumer_yes_rate=s["consumer"],
                         owned_yes_rate=s["owned"], yes_rate_gap=gap, yes_rate_gap_low=gap - 0.15,
                         yes_rate_gap_high=gap + 0.15,
                         significant=abs(gap) > 0.15, threshold=0.5, encoder_id=ENCODER_ID)
                )
        tables["attribute_gaps"] = pd.DataFrame(gap_rows)

    if with_contexts:
        xy = np.where(
            contexts_of[:, None] >= 0, centres[np.maximum(contexts_of, 0)], 0
        ) + rng.normal(0, 1.0, size=(n, 2))
        names = np.array([contexts[c] if c >= 0 else "unassigned" for c in contexts_of], dtype=object)
        tables["image_contexts"] = pd.DataFrame(
            dict(image_id=usable["image_id"], context_id=contexts_of, context=names,
                 membership=np.where(contexts_of >= 0, rng.uniform(0.3, 1, size=n), 0.0),
                 map_x=xy[:, 0], map_y=xy[:, 1])
        )
        ctx_rows = []
        for c, name in enumerate(contexts):
            members = usable["image_id"][contexts_of == c].tolist()
            ctx_rows.append(dict(context_id=c, context=name, size=len(members), share=len(members) / n,
                                 name_score=0.3, alternatives=f"{name} outdoors | {name} at home",
                                 exemplars=" ".join(members[:6]), min_cluster_size=5))
        # As explore/contexts/stage.py writes it: unassigned images as context -1, last.
        ctx_rows.append(dict(context_id=-1, context="unassigned", size=int((contexts_of < 0).sum()),
                             share=float((contexts_of < 0).mean()), name_score=np.nan, alternatives="",
                             exemplars="", min_cluster_size=5))
        tables["contexts"] = pd.DataFrame(ctx_rows)
        bc_rows = []
        frame = usable.assign(context_id=contexts_of)
        for source in ("all", "consumer", "owned"):
            sub = frame if source == "all" else frame[frame.source == source]
            for brand, g in sub.groupby("brand"):
                cat_sub = sub[sub.category == brands[brand]]
                for c, name in [(-1, "unassigned")] + list(enumerate(contexts)):
                    count = int((g.context_id == c).sum())
                    share = count / len(g)
                    cshare = (cat_sub.context_id == c).mean()
                    bc_rows.append(dict(brand=brand, category=brands[brand], source=source, context_id=c,
                                        context=name, count=count, brand_n=len(g), share=share,
                                        category_share=cshare, index=100 * share / cshare if cshare else np.nan,
                                        p_value=0.01 if count > 8 else 0.5, q_value=0.03 if count > 8 else 0.6))
        bc = pd.DataFrame(bc_rows)
        tables["brand_contexts"] = bc
        assigned = bc[bc.context_id >= 0]
        tables["signature_contexts"] = assigned[(assigned["index"] >= 110) & (assigned.source == "all")].assign(
            rest_count=1, rest_n=10, rest_share=0.1, rank=1)
        tables["unexpected_contexts"] = assigned[(assigned["index"] <= 90) & (assigned.source != "owned")].assign(
            rest_count=1, rest_n=10, rest_share=0.1, dominant_category="outdoor", dominant_share=0.3,
            reason="typical of category outdoor", rank=1, brand_rank=1,
        )
        tables["source_context_gaps"] = bc[bc.source != "all"].pivot_table(
            index=["brand", "context_id", "context"], columns="source", values="share"
        ).reset_index().rename(columns={"consumer": "consumer_share", "owned": "owned_share"})

    if with_compare:
        survey = pd.DataFrame(
            [dict(row=k + 2, brand=b, attribute=a, score=float(rng.uniform(1, 7)), category=brands[b],
                  sample_size=200.0, note="asked <i>online</i>" if hostile else "")
             for k, (b, a) in enumerate((b, a) for b in brand_names for a in attributes)]
        )
        tables["survey"] = survey
        tables["agreement"] = pd.DataFrame(
            [dict(category=cat, attribute=a, metric_a="consumer_share", metric_b="survey_score", n_brands=2,
                  concordant_share=0.5, ties=0, kendall_tau=0.0, kendall_p=1.0, spearman_rho=0.0,
                  spearman_p=1.0, pearson_r=0.1, pearson_p=0.9, note="only 2 brands: no test")
             for cat in ("drinks", "outdoor") for a in attributes]
        )
        # Columns as explore/compare.py writes them (brand_maps, brand_vector_map, brand_displacement).
        map_rows, load_rows = [], []
        for source in ("consumer", "owned", "survey"):
            pts = rng.normal(0, 1.5, size=(len(brand_names), 2))
            for b, (x, y) in zip(brand_names, pts):
                map_rows.append(dict(source=source, brand=b, category=brands[b], pc1=x, pc2=y,
                                     aligned_x=x + 0.1, aligned_y=y - 0.1, explained_1=0.6, explained_2=0.3,
                                     n_brands=len(brand_names), n_attributes=len(attributes), disparity=0.2))
            for a in attributes:
                l1, l2 = rng.uniform(-1, 1, size=2)
                load_rows.append(dict(source=source, attribute=a, loading_1=l1, loading_2=l2, direction_1=l1,
                                      direction_2=l2, aligned_1=l1, aligned_2=l2, used=True))
        bm = pd.DataFrame(map_rows)
        tables["brand_map"] = bm
        tables["brand_map_loadings"] = pd.DataFrame(load_rows)
        vec_rows = []
        for b in brand_names:
            for source in ("consumer", "owned", "all"):
                x, y = rng.normal(0, 0.2, size=2)
                vec_rows.append(dict(brand=b, category=brands[b], source=source, n_images=10, x=x, y=y,
                                     nearest_brand=brand_names[0], nearest_distance=0.1, vectors="cluster"))
        tables["brand_vector_map"] = pd.DataFrame(vec_rows)
        disp = []
        for b in brand_names:
            row = dict(brand=b, category=brands[b])
            for source in ("consumer", "owned", "survey"):
                r = bm[(bm.source == source) & (bm.brand == b)].iloc[0]
                row[f"{source}_x"], row[f"{source}_y"] = r.aligned_x, r.aligned_y
            row["displacement"] = math.hypot(row["owned_x"] - row["consumer_x"], row["owned_y"] - row["consumer_y"])
            row["survey_displacement"] = math.hypot(row["survey_x"] - row["consumer_x"], row["survey_y"] - row["consumer_y"])
            row.update(owned_rank_gap=0.5, survey_rank_gap=1.0, vector_distance=0.05, vector_displacement=0.1)
            disp.append(row)
        tables["brand_displacement"] = pd.DataFrame(disp).sort_values("displacement", ascending=False)

    for name, table in tables.items():
        table.to_parquet(out / f"{name}.parquet", index=False)
        table.to_csv(out / f"{name}.csv", index=False)
    run = {
        "study": ("study " + HOSTILE_BRAND) if hostile else "Synthetic test study",
        "study_file": str(folder / "study.toml"),
        "written_at": "2026-01-02T03:04:05+00:00",
        "encoder_id": ENCODER_ID,
        "encoder_notice": "",
        "counts": {"found": len(all_images), "used": n, "skipped": len(skipped), "embedded_this_run": n},
        "stage_seconds": {"collect": 0.1, "embed": 1.0},
        "settings": {"name": "Synthetic test study", "seed": seed, "brands": brands,
                     "images": {"root": str(root), "manifest": None},
                     "report": {"thumbnail_px": thumbnail_px, "max_thumbnails": 20000 if max_thumbnails is None else max_thumbnails}},
        "tables": list(tables),
        "notes": [],
    }
    (out / "run.json").write_text(json.dumps(run, indent=2), encoding="utf-8")
    return out
