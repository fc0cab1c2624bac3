"""`qhl cut`: cut spin clusters out of a structure file (PDB, mmCIF, XYZ) into cluster files."""

from ..survey.structure import (DEFAULT_EXPERIMENT, cut_clusters, invented_offsets_hz, read_structure,
                         write_cluster_files)
from .common import CENTRES, CLUSTER_SIZE, FIELD_T, RADIUS, SEED, SHIFT_SPREAD, print_json


def register(sub):
    p = sub.add_parser("cut", help="cut clusters of K nuclei around N centres of a structure file")
    p.add_argument("structure", metavar="STRUCTURE", help="structure file: .pdb, .cif (mmCIF) or .xyz")
    p.add_argument("--isotope", action="append", metavar="ISOTOPE",
                   help="isotope to keep (repeatable; default 1H); the first is observed")
    p.add_argument("--size", type=CLUSTER_SIZE, required=True, metavar="K",
                   help="spins per cluster (with --radius: at most K)")
    p.add_argument("--centres", type=CENTRES, required=True, metavar="N",
                   help="number of centres, spread by farthest-point sampling")
    p.add_argument("--radius", type=RADIUS, metavar="R", help="keep nuclei within R angstrom of the centre")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the cluster files (created)")
    p.add_argument("--field", type=FIELD_T, default=9.4, metavar="TESLA", help="static field (default 9.4 T)")
    p.add_argument("--shift-spread", type=SHIFT_SPREAD, default=0.0, metavar="PPM",
                   help="invent chemical shifts uniform over PPM (default 0: all offsets zero)")
    p.add_argument("--seed", type=SEED, default=0, help="seed of the invented shifts (default 0)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=run)


def run(args):
    isotopes = tuple(args.isotope or ["1H"])
    nuclei = read_structure(args.structure, isotopes)
    offsets = None
    if args.shift_spread:
        offsets = invented_offsets_hz(nuclei, args.shift_spread, args.field, args.seed)
    clusters = cut_clusters(nuclei, args.size, args.centres, radius=args.radius, field_tesla=args.field,
                            experiments=(DEFAULT_EXPERIMENT,), offsets_hz=offsets, observe=isotopes[0])
    how = f"within {args.radius:g} A, at most {args.size}" if args.radius else f"{args.size} nearest"
    note = (f"cut by qhl from {args.structure}: {how} {'/'.join(isotopes)} nuclei around one centre"
            + (f"; invented shifts over {args.shift_spread:g} ppm (seed {args.seed})" if offsets is not None else ""))
    paths = write_cluster_files(clusters, args.out, comment=note)
    report = {"structure": str(args.structure), "isotopes": list(isotopes), "nuclei": len(nuclei),
              "centres": args.centres, "clusters": len(clusters), "duplicates_dropped": args.centres - len(clusters),
              "files": [str(p) for p in paths], "sizes": [c.n_spins for c in clusters]}
    if args.json:
        print_json(report)
        return 0
    print(f"{args.structure}: {len(nuclei)} nuclei of {', '.join(isotopes)}")
    print(f"wrote {len(paths)} clusters ({how}) to {args.out}"
          + (f"; {report['duplicates_dropped']} duplicate or empty centres dropped" if report["duplicates_dropped"] else ""))
    for c, path in zip(clusters, paths):
        print(f"  {path}  {c.n_spins} spins")
    return 0
