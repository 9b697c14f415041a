"""The bundled demo study: a deterministic generator and the ``demo`` job.

The scenario is fictional: the quarterly rider survey of *Larkmoor Valley Transit*, an
invented bus-and-tram operator serving three districts (Northfield, Town Centre,
Southbank). Thirteen quarterly waves, 2023-Q1 to 2026-Q1, of 850 to 1,450 riders each.

Planted truths (what the later steps must find, and must not find):

1. **Sudden drop that persists** - ``on_time_good`` (punctuality good or very good) falls
   by 10 points at 2025-Q2 (a timetable change) and stays down.
2. **Steady trend** - ``satisfied`` (overall satisfaction, top-2 box) rises by 3 points a
   year across the whole series; ``satisfaction_mean`` moves with it.
3. **One-wave blip** - ``clean_good`` (cleanliness good) is 11 points lower in 2024-Q3
   only, back to normal the next wave.
4. **Subgroup-only change** - ``staff_good`` falls by 20 points in Southbank from 2025-Q3
   on; the other districts do not move.
5. **Pure noise** - ``info_good`` (travel information good) has the same true value in
   every wave and every subgroup.
6. **Renamed column** - overall satisfaction was ``sat_overall`` before 2024-Q1 (an alias).
7. **Recoded code** - ticket type "Season pass" was code 4 in 2023-Q1 and 2023-Q2
   (today's code 3; a codebook recode).
8. **Wording break** - the safety question was reworded from 2024-Q1 (``break_before``);
   its level jumps by 8 points there for that reason alone.
9. **Sample-mix shift** - 2025-Q4 was fielded mostly at peak hours: riders who travel
   most days rise from about 35 % to about 58 % of the sample. Frequent riders rate
   fares far better, so ``fares_fair`` jumps that wave through mix alone (frequency is
   not a weighting target). No within-group change is planted anywhere in fares.
10. **Varying weights** - every wave is rim-weighted to district and age-band targets, and
    the achieved district and age mix varies from wave to wave, so effective bases
    are below the bases.

``recommend_balance``, ``tram_use`` and ``tram_on_time`` (on-time among tram users, a
metric with a narrowed base) also exist; only ``tram_on_time`` carries a planted move (the
punctuality drop).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd

from .weighting import rake

SEED = 20261201
WAVES = [f"{y}-Q{q}" for y in (2023, 2024, 2025) for q in (1, 2, 3, 4)] + ["2026-Q1"]
AREAS = {1: "Northfield", 2: "Town Centre", 3: "Southbank"}
AREA_TARGET = {"Northfield": 0.40, "Town Centre": 0.35, "Southbank": 0.25}
AGE_TARGET = {"16-34": 0.35, "35-59": 0.40, "60+": 0.25}

CODEBOOK = """\
title: Larkmoor Valley Transit - quarterly rider survey (fictional demo)
id: rider_id
weight: wt

variables:
  area:
    label: District the rider lives in
    type: category
    codes: {1: Northfield, 2: Town Centre, 3: Southbank}
  age:
    label: Age in years
    type: number
    range: [16, 99]
  frequency:
    label: How often the rider travels with us
    type: category
    codes: {1: Most days, 2: Once or twice a week, 3: Less often}
  ticket:
    label: Ticket usually bought
    type: category
    codes: {1: Single fares, 2: Day pass, 3: Season pass}
    recode:
      - waves: [2023-Q1, 2023-Q2]
        map: {4: 3}
  modes:
    label: Services used in the past month
    type: multi
    options: {mode_bus: Bus, mode_tram: Tram, mode_parkride: Park and ride}
  overall:
    label: Overall satisfaction with our services
    type: scale
    codes: {1: Very dissatisfied, 2: Fairly dissatisfied, 3: Neither, 4: Fairly satisfied, 5: Very satisfied}
    missing: {9: Don't know}
    aliases: [sat_overall]
  punctuality:
    label: Rating of punctuality
    type: scale
    codes: {1: Very poor, 2: Poor, 3: Fair, 4: Good, 5: Very good}
    missing: {9: Don't know}
  cleanliness:
    label: Rating of vehicle cleanliness
    type: scale
    codes: {1: Very poor, 2: Poor, 3: Fair, 4: Good, 5: Very good}
    missing: {9: Don't know}
  information:
    label: Rating of travel information
    type: scale
    codes: {1: Very poor, 2: Poor, 3: Fair, 4: Good, 5: Very good}
    missing: {9: Don't know}
  staff:
    label: Rating of staff helpfulness
    type: scale
    codes: {1: Very poor, 2: Poor, 3: Fair, 4: Good, 5: Very good}
    missing: {9: Don't know}
  safety:
    label: Feeling safe on board
    type: scale
    codes: {1: Very unsafe, 2: Fairly unsafe, 3: Neither, 4: Fairly safe, 5: Very safe}
    missing: {9: Don't know}
    break_before: 2024-Q1
  fares:
    label: Fares are fair for the journeys made
    type: scale
    codes: {1: Strongly disagree, 2: Disagree, 3: Neither, 4: Agree, 5: Strongly agree}
    missing: {9: Don't know}
  recommend:
    label: Likelihood to recommend (0-10)
    type: scale
    codes: {0: "0", 1: "1", 2: "2", 3: "3", 4: "4", 5: "5", 6: "6", 7: "7", 8: "8", 9: "9", 10: "10"}
  comments:
    label: Any other comments
    type: text

groups:
  area: {variable: area}
  age_band:
    variable: age
    bands: {"16-34": [16, 34], "35-59": [35, 59], "60+": [60, 99]}
  frequency: {variable: frequency, merge: {Most days: [1], Less often than daily: [2, 3]}}

# the study team's judgement of the smallest change worth acting on, per kind of measure
smallest_change: {share: 5, balance: 8, mean: 0.2}

metrics:
  satisfied:
    label: Satisfied overall (top-2 box)
    variable: overall
    share: [4, 5]
  satisfaction_mean:
    label: Mean overall satisfaction (1-5)
    variable: overall
    mean: true
  on_time_good:
    label: Punctuality good or very good
    variable: punctuality
    share: [4, 5]
  tram_on_time:
    label: Punctuality good or very good (tram users)
    variable: punctuality
    share: [4, 5]
    base: {variable: modes, codes: [mode_tram]}
  clean_good:
    label: Cleanliness good or very good
    variable: cleanliness
    share: [4, 5]
  info_good:
    label: Travel information good or very good
    variable: information
    share: [4, 5]
  staff_good:
    label: Staff helpfulness good or very good
    variable: staff
    share: [4, 5]
  safe:
    label: Feel safe on board (top-2 box)
    variable: safety
    share: [4, 5]
  fares_fair:
    label: Agree fares are fair (top-2 box)
    variable: fares
    share: [4, 5]
  tram_use:
    label: Used the tram in the past month
    variable: modes
    share: [mode_tram]
  recommend_balance:
    label: Recommend balance (9-10 minus 0-6)
    variable: recommend
    balance: {plus: [9, 10], minus: [0, 1, 2, 3, 4, 5, 6]}

profile: [area, age_band, frequency]
targets:
  area: {Northfield: 0.40, Town Centre: 0.35, Southbank: 0.25}
  age_band: {"16-34": 0.35, "35-59": 0.40, "60+": 0.25}
"""


def fieldwork_date(label: str) -> str:
    year, q = int(label[:4]), int(label[-1])
    return dt.date(year, 3 * q - 1, 20).isoformat()


def _rating(rng: np.random.Generator, p_top2: np.ndarray, dk: float = 0.03) -> np.ndarray:
    """A 1-5 rating whose chance of 4 or 5 is p_top2; 9 (don't know) with chance dk."""
    n = p_top2.size
    top = rng.random(n) < p_top2
    high = np.where(rng.random(n) < 0.45, 5, 4)
    low = rng.choice([1, 2, 3], size=n, p=[0.2, 0.3, 0.5])
    out = np.where(top, high, low)
    return np.where(rng.random(n) < dk, 9, out)


def make_wave(label: str, rng: np.random.Generator) -> pd.DataFrame:
    k = WAVES.index(label)
    years = k / 4.0
    n = int(rng.integers(850, 1451))
    # achieved mix drifts from wave to wave (so the weights vary)
    area_p = np.array([0.44, 0.38, 0.18]) + rng.normal(0, 0.025, 3)
    area_p = np.clip(area_p, 0.1, None)
    area_p /= area_p.sum()
    area = rng.choice([1, 2, 3], size=n, p=area_p)
    old = rng.random(n) < 0.33 + rng.normal(0, 0.02)
    age = np.where(old, rng.integers(60, 90, n), rng.integers(16, 60, n))
    freq_p = [0.58, 0.27, 0.15] if label == "2025-Q4" else [0.35, 0.40, 0.25]
    frequency = rng.choice([1, 2, 3], size=n, p=freq_p)
    ticket = np.where(frequency == 1, rng.choice([1, 2, 3], n, p=[0.2, 0.2, 0.6]),
                      rng.choice([1, 2, 3], n, p=[0.6, 0.3, 0.1]))
    if label in ("2023-Q1", "2023-Q2"):
        ticket = np.where(ticket == 3, 4, ticket)
    mode_bus = (rng.random(n) < 0.85).astype(int)
    mode_tram = (rng.random(n) < 0.40).astype(int)
    mode_parkride = (rng.random(n) < 0.12).astype(int)

    satisfied = np.full(n, 0.58 + 0.03 * years)
    on_time = np.full(n, 0.70 - (0.10 if k >= WAVES.index("2025-Q2") else 0.0))
    clean = np.full(n, 0.64 - (0.11 if label == "2024-Q3" else 0.0))
    info = np.full(n, 0.55)
    staff = np.where((area == 3) & (k >= WAVES.index("2025-Q3")), 0.72 - 0.20, 0.72)
    safe = np.full(n, 0.66 + (0.08 if k >= WAVES.index("2024-Q1") else 0.0))
    fares = np.select([frequency == 1, frequency == 2], [0.66, 0.44], 0.30)
    rec_plus = 0.34
    rec_minus = 0.22

    u = rng.random(n)
    recommend = np.where(u < rec_plus, rng.integers(9, 11, n),
                         np.where(u < rec_plus + rec_minus, rng.integers(0, 7, n), rng.integers(7, 9, n)))
    comments = np.where(rng.random(n) < 0.1, rng.choice(["More late buses please", "Good drivers",
                                                        "Tram stop needs a shelter", "Fine"], n), "")
    table = pd.DataFrame({
        "rider_id": [f"{label.replace('-', '')}-{i:05d}" for i in range(1, n + 1)],
        "area": area, "age": age, "frequency": frequency, "ticket": ticket,
        "mode_bus": mode_bus, "mode_tram": mode_tram, "mode_parkride": mode_parkride,
        "overall": _rating(rng, satisfied), "punctuality": _rating(rng, on_time),
        "cleanliness": _rating(rng, clean), "information": _rating(rng, info),
        "staff": _rating(rng, staff), "safety": _rating(rng, safe), "fares": _rating(rng, fares),
        "recommend": recommend, "comments": comments,
    })
    band = np.select([age <= 34, age <= 59], ["16-34", "35-59"], "60+")
    result = rake([np.vectorize(AREAS.get)(area), band], [AREA_TARGET, AGE_TARGET])
    table.insert(1, "wt", np.round(result.weights, 6))
    if k < WAVES.index("2024-Q1"):
        table = table.rename(columns={"overall": "sat_overall"})
    return table


def write_demo_waves(folder: str | Path) -> list[Path]:
    """Write the codebook, a manifest and the 13 wave CSVs into ``folder`` (deterministic)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)
    (folder / "codebook.yaml").write_text(CODEBOOK, encoding="utf-8")
    written = []
    manifest = []
    for label in WAVES:
        path = folder / f"riders-{label}.csv"
        make_wave(label, rng).to_csv(path, index=False, lineterminator="\n")
        written.append(path)
        manifest.append({"wave": label, "fieldwork_date": fieldwork_date(label), "file": path.name})
    pd.DataFrame(manifest).to_csv(folder / "manifest.csv", index=False, lineterminator="\n")
    return written


def bundled_waves() -> Path:
    """The repo's ``waves/`` folder (the committed output of :func:`write_demo_waves`)."""
    return Path(__file__).resolve().parent.parent / "waves"


def build_demo(target: str | Path, source: str | Path | None = None):
    """Make a study at ``target`` from the demo wave files and add every wave in order."""
    from .study import Study

    source = Path(source) if source else bundled_waves()
    if not (source / "manifest.csv").is_file():
        # installed without the repo's waves/: regenerate the identical files
        import tempfile

        source = Path(tempfile.mkdtemp(prefix="tracker-demo-waves-"))
        write_demo_waves(source)
    study = Study.create(target, source / "codebook.yaml")
    from .progress import step

    reports = []
    manifest = pd.read_csv(source / "manifest.csv", dtype=str)
    for k, row in enumerate(manifest.itertuples()):
        step("adding waves", k, len(manifest), row.wave)
        reports.append(study.add(source / row.file, row.wave, row.fieldwork_date))
    step("adding waves", len(manifest), len(manifest))
    return study, reports


if __name__ == "__main__":  # python -m tracker.demo [FOLDER] regenerates the bundled files
    import sys

    out = write_demo_waves(sys.argv[1] if len(sys.argv) > 1 else bundled_waves())
    print(f"wrote {len(out)} wave files")
