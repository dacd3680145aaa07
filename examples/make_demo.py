"""Regenerate the demo data (examples/shift_outlook.csv) and the demo pipelines (pipelines/).

Run from the repository root: ``python examples/make_demo.py``. The scenario is invented
(see invariance/demo.py for the questionnaire and the planted effects); the seed makes
the data reproducible.
"""

import pathlib

from invariance.demo import pipeline_text, simulate

ROOT = pathlib.Path(__file__).resolve().parents[1]
SEED = 20261201


def main() -> None:
    data = ROOT / "examples" / "shift_outlook.csv"
    simulate(seed=SEED, n_per_site=400).to_csv(data, index=False)
    for group, ref in (("site", "harbor"), ("occupation", "nursing")):
        path = ROOT / "pipelines" / f"shift_outlook_by_{group}.yaml"
        path.write_text(
            pipeline_text(
                data="../examples/shift_outlook.csv",
                group=group,
                title=f"Shift Outlook Survey by {group}",
                reference=ref,
                out=f"../runs/shift_outlook_by_{group}",
            ),
            encoding="utf-8",
        )
        print(f"wrote {path.relative_to(ROOT)}")
    print(f"wrote {data.relative_to(ROOT)}")


if __name__ == "__main__":
    main()
