"""Options shared by several commands, defined once."""

from __future__ import annotations

import click


def _bbox(ctx, param, value):
    if value is None:
        return None
    try:
        parts = tuple(float(v) for v in value.split(","))
    except ValueError:
        raise click.BadParameter("expected four numbers XMIN,YMIN,XMAX,YMAX") from None
    if len(parts) != 4:
        raise click.BadParameter("expected four numbers XMIN,YMIN,XMAX,YMAX")
    return parts


band_option = click.option("--band", type=click.IntRange(min=1), default=None,
                           help="Band to read (1-based); required for multi-band files.")
bbox_option = click.option("--bbox", callback=_bbox, default=None, metavar="XMIN,YMIN,XMAX,YMAX",
                           help="Read only this window (CRS units).")
