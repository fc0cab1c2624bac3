"""Cut proton clusters from the invented demo structure and scan them over dipolar scales on Dask.

Run: python examples/scan_demo.py   (writes into a fresh temporary folder and prints its path)
"""

from pathlib import Path
import tempfile

from qhl.survey.scan import ScanSettings, define_scan, read_results, run_scan
from qhl.survey.scan_plots import plot_scan
from qhl.survey.structure import (cut_clusters, demo_structure_path, invented_offsets_hz, read_structure,
                           write_cluster_files)


def main():
    work = Path(tempfile.mkdtemp(prefix="qhl-scan-demo-"))
    nuclei = read_structure(demo_structure_path(), "1H")
    offsets = invented_offsets_hz(nuclei, spread_ppm=8.0, field_tesla=9.4, seed=0)  # made-up shifts
    clusters = cut_clusters(nuclei, size=6, centres=4, offsets_hz=offsets)
    files = write_cluster_files(clusters, work / "clusters")
    print(f"{len(nuclei)} protons in {demo_structure_path().name}; {len(files)} clusters of 6 in {work / 'clusters'}")

    definition = define_scan(files, (0.0, 0.1, 0.3, 1.0), ScanSettings(points=48))
    results = work / "results.csv"
    first = run_scan(definition, results, workers=2, progress=False)       # LocalCluster, 2 workers
    again = run_scan(definition, results, workers=2, progress=False)       # resumes: nothing left to do
    print(f"{first.computed} tasks computed on {first.workers} workers; rerun computed {again.computed}")

    _, rows = read_results(results)
    print(f"{'cluster':<22}{'scale':>6}{'min Fisher eig':>16}{'median CRB (Hz)':>17}{'<r>':>7}{'D2':>6}")
    for r in sorted(rows, key=lambda r: (r["cluster"], r["dipolar_scale"])):
        print(f"{r['cluster']:<22}{r['dipolar_scale']:>6.2f}{r['fisher_min_eigenvalue']:>16.3e}"
              f"{r['median_crb_hz']:>17.4g}{r['mean_r']:>7.3f}{r['mean_d2']:>6.2f}")
    for p in plot_scan(rows, work / "plots"):
        print(f"wrote {p}")


if __name__ == "__main__":
    main()
