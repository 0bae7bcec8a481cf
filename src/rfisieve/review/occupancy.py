"""Occupancy statistics of mask files: what fraction of each channel was flagged, why, when.

The ``occupancy`` command: :func:`occupancy_of_mask` counts one mask file
(:mod:`rfisieve.review.counts`) and writes its tables (:mod:`rfisieve.review.tables`,
where the file formats are described).  The names of both modules are re-exported here.
"""

import argparse
import os

from rfisieve.review.counts import *  # noqa: F401,F403
from rfisieve.review.counts import IMAGE_BINS, count_mask_file
from rfisieve.review.tables import *  # noqa: F401,F403
from rfisieve.review.tables import scan_table, write_csv, write_scan_h5


def occupancy_of_mask(mask_path, csv_path, h5_path, chunk_dumps=None, image_bins=IMAGE_BINS, counted=None,
                      data_image=None):
    """Count mask file ``mask_path`` and write its per-scan CSV and HDF5; return the counts.

    ``counted``: a :class:`~rfisieve.review.counts.ScanOccupancy` that already holds the
    mask's counts (taken while the mask was in memory); the file's /flags is then not read.
    ``data_image``: ``(image, note)`` of :class:`rfisieve.review.provenance.DataImage`
    on the same image bins, stored as ``/image/data`` with the attribute
    ``data_image_note`` (the review then reads no scan file).
    """
    counts = count_mask_file(mask_path, chunk_dumps=chunk_dumps, image_bins=image_bins, counted=counted)
    if data_image is not None:
        img, note = data_image
        if img.shape == counts["image/flagged"].shape:
            counts["image/data"] = img
            counts["attrs"]["data_image_note"] = note
    for p in (csv_path, h5_path):
        if p:
            os.makedirs(os.path.dirname(os.path.abspath(p)), exist_ok=True)
    if csv_path:
        write_csv(csv_path, scan_table(counts))
    if h5_path:
        write_scan_h5(h5_path, counts)
    return counts


def _cmd_occupancy(args):
    # RfisieveError reaches rfisieve.cli.main, which prints it as one line, exit 2
    occupancy_of_mask(args.mask, args.csv, args.h5, chunk_dumps=args.chunk_dumps,
                      image_bins=(args.image_bins, args.image_bins))
    return 0


def register_cli(subparsers):
    """Add the ``occupancy`` subcommand to an argparse ``subparsers`` object."""
    p = subparsers.add_parser(
        "occupancy",
        help="count flagged samples of one mask file per channel, dump, product and cause",
        description=(
            "Read one mask file (<outdir>/flags/<scan>.h5) in chunks of dumps and write "
            "its occupancy tables: a CSV with one row per channel (band, channel, freq_mhz, "
            "samples, flagged fraction, one fraction per cause bit, one per product) and "
            "an HDF5 file with the exact counts (per channel, dump, product, cause, and a "
            "time x channel image) for `rfisieve review`."),
        formatter_class=argparse.ArgumentDefaultsHelpFormatter,
    )
    p.add_argument("mask", metavar="MASK", help="mask file written by the flagger (<outdir>/flags/<scan>.h5)")
    p.add_argument("--csv", required=True, metavar="OUT.csv", help="per-channel table to write")
    p.add_argument("--h5", required=True, metavar="OUT.h5", help="counts file to write (input of `rfisieve review`)")
    p.add_argument("--chunk-dumps", type=int, default=None, metavar="N",
                   help="dumps read per chunk (default: about 32 MiB of mask per chunk)")
    p.add_argument("--image-bins", type=int, default=IMAGE_BINS[0], metavar="N",
                   help="largest number of time and of channel bins of the occupancy image")
    p.set_defaults(func=_cmd_occupancy)
    return p
