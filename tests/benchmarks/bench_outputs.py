"""Cost of atomic writing and of reading a large cell (not part of the CI run).

    python tests/benchmarks/bench_outputs.py

1. The text of a pattern JSON document of Si [2 3 0] (about 280 kB) written
   through laueline.io.outputs.write_text (temporary, fsync, exclusive link),
   median of 21, against the simplest baseline: the same text written with
   Path.write_text (no sync, no rename) in the same run; and write_json with
   the encoding, for scale.
2. Reading a 13,824-atom cell (12 x 12 x 12 silicon supercell in P 1), median
   of 3: symmetry expansion and the k-d tree close-pair search, against
   gemmi's own reading of the same block (make_small_structure_from_block).
"""

import json
import sys
import tempfile
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from timing import median_time  # noqa: E402

from laueline import predict, read_crystal  # noqa: E402
from laueline.io.outputs import json_ready, write_json, write_text  # noqa: E402
from laueline.report import pattern_document  # noqa: E402


def _supercell_cif(n=12):
    base = np.array([[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0], [.25, .25, .25],
                     [.25, .75, .75], [.75, .25, .75], [.75, .75, .25]])
    shifts = np.stack(np.meshgrid(*[np.arange(n)] * 3, indexing="ij"), -1).reshape(-1, 1, 3)
    sites = ((base + shifts) / n).reshape(-1, 3)
    a = 5.431 * n
    head = (f"data_big\n_cell_length_a {a}\n_cell_length_b {a}\n_cell_length_c {a}\n"
            "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n"
            "_symmetry_space_group_name_H-M 'P 1'\nloop_\n_atom_site_label\n"
            "_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n"
            "_atom_site_fract_z\n_atom_site_U_iso_or_equiv\n")
    return head + "".join(f"Si{i} Si {x:.6f} {y:.6f} {z:.6f} 0.006\n"
                          for i, (x, y, z) in enumerate(sites)), len(sites)


def main():
    doc = pattern_document(predict(read_crystal("Si"), (2, 3, 0), 200.0, 6.0))
    text = json.dumps(json_ready(doc), indent=1) + "\n"
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        counter = iter(range(10**6))
        ours = median_time(lambda: write_text(folder / f"a{next(counter)}.json", text), 21)
        plain = median_time(lambda: (folder / f"b{next(counter)}.json").write_text(text), 21)
        whole = median_time(lambda: write_json(doc, folder / f"c{next(counter)}.json"), 21)
        print(f"JSON text ({len(text) / 1e3:.0f} kB): atomic write {ours * 1e3:.2f} ms, plain "
              f"write_text {plain * 1e3:.2f} ms, ratio {ours / plain:.1f}; write_json "
              f"including the encoding {whole * 1e3:.1f} ms")

        import gemmi

        cif, n_atoms = _supercell_cif()
        path = folder / "big.cif"
        path.write_text(cif)
        ours = median_time(lambda: read_crystal(path), 3)
        base = median_time(lambda: gemmi.make_small_structure_from_block(
            gemmi.cif.read_string(cif).sole_block()), 3)
        print(f"{n_atoms}-atom cell: read_crystal {ours:.2f} s, gemmi parse alone "
              f"{base:.2f} s, ratio {ours / base:.1f}")


if __name__ == "__main__":
    main()
