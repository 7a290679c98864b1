"""Write the invented demo morphologies of this folder with cabletree's generators.

Run from anywhere: ``python morphologies/make_demo_morphologies.py``.  The files are
deterministic, so running it again reproduces them byte for byte.
"""

from __future__ import annotations

from pathlib import Path

from cabletree.morphology import synthetic, write_swc

HERE = Path(__file__).resolve().parent


def main() -> None:
    """Write pyramidal_demo.swc, ball_and_stick.swc and branched_test_tree.swc."""
    cells = {
        "pyramidal_demo.swc": synthetic.pyramidal_cell(seed=0),
        "ball_and_stick.swc": synthetic.ball_and_stick(
            soma_diameter_um=20.0, dendrite_length_um=200.0, dendrite_diameter_um=2.0
        ),
        "branched_test_tree.swc": synthetic.random_tree(n_branches=15, seed=1),
    }
    for name, morph in cells.items():
        print(f"wrote {write_swc(morph, HERE / name)} ({morph.n_samples} samples)")


if __name__ == "__main__":
    main()
