"""Everything that touches the file system: reading DEMs, atomic writes, scratch.

This package is the only code that opens paths or names scratch files. Every
output is written to a temporary name in the destination folder and renamed
into place when it is complete, so an interrupted run leaves either the
previous file or none, never a partial one.

=================  ==========================================================
module             job
=================  ==========================================================
``rasters``        raster headers; DEMs in memory, onto disk or by window
``outlets``        outlets files and their CRS
``publication``    the output folder: lock, staging, publication, tidy-up
``checked``        checked atomic writes (read back, fsync, rename)
``formats``        COG layers, GeoPackage/CSV tables, PNG, JSON, npz
``files``          hashes, same-file tests, available memory, numba's cache
``scratch``        scratch folders and their file names, ``NpyWindows``,
                   the worker context, ``CountStore`` (Zarr)
=================  ==========================================================

Every public name is re-exported here: ``from terrain.io import X``.
"""

from ._base import LOCK_NAME, PUBLISHING, STAGING_PREFIX, free_bytes
from .checked import atomic_path, discard_partial
from .files import (
    available_memory,
    file_exists,
    file_sha256,
    keep_freed_memory,
    kernel_cache_folder,
    release_freed_memory,
    remove_file,
    replaced_beside_checkpoint,
    resident_memory,
    resolves_into,
    same_file,
    source_bytes,
)
from .formats import (
    CHECKPOINT_SUFFIX,
    FORMULA_START,
    WINDOW_WRITE_CACHE,
    csv_cell,
    csv_safe,
    load_npz,
    one_gdal_thread,
    save_npz,
    write_csv,
    write_figure,
    write_frames,
    write_json,
    write_layer,
    write_layers_by_window,
)
from .outlets import read_outlets
from .publication import (
    OUTPUT_NAME,
    check_file_folder,
    claim_outdir,
    clean_leftovers,
    hold_checkpoint,
    hold_outdir,
    prepare_outdir,
    recorded_outputs,
    replaced_by,
    staged_names,
    staged_outputs,
)
from .rasters import SENTINELS, RasterWindows, dem_warnings, dem_windows, read_dem, read_header
from .scratch import (
    COUNTS_TAG,
    SCRATCH_LOCK,
    SCRATCH_PREFIX,
    CountStore,
    NpyWindows,
    check_count_store_path,
    check_counts_url,
    check_scratch_space,
    count_store_file,
    create_npy,
    is_count_store,
    is_url,
    levels_file,
    load_scratch,
    load_shared,
    remove_orphan_scratch,
    save_npy,
    save_scratch,
    save_shared,
    scratch_file,
    scratch_folder,
    scratch_parent,
    write_npy_window,
)

__all__ = ["read_dem", "read_header", "RasterWindows", "dem_windows", "SENTINELS", "read_outlets",
           "dem_warnings", "atomic_path", "discard_partial", "one_gdal_thread", "keep_freed_memory",
           "write_json", "write_layer", "prepare_outdir", "claim_outdir", "hold_outdir",
           "staged_outputs", "clean_leftovers", "write_frames", "write_csv", "write_figure",
           "save_npz", "load_npz", "file_sha256", "available_memory", "release_freed_memory",
           "resident_memory", "LOCK_NAME",
           "STAGING_PREFIX", "PUBLISHING", "same_file", "source_bytes", "file_exists",
           "remove_file", "check_file_folder",
           "NpyWindows", "create_npy", "write_npy_window", "save_npy", "save_scratch",
           "load_scratch", "scratch_folder", "save_shared", "load_shared",
           "remove_orphan_scratch", "CountStore", "write_layers_by_window",
           "SCRATCH_PREFIX", "hold_checkpoint", "OUTPUT_NAME", "csv_cell", "csv_safe",
           "FORMULA_START", "scratch_parent", "free_bytes", "check_scratch_space",
           "is_count_store", "check_count_store_path", "check_counts_url", "is_url", "COUNTS_TAG",
           "SCRATCH_LOCK", "recorded_outputs", "staged_names",
           "resolves_into", "replaced_by", "kernel_cache_folder", "replaced_beside_checkpoint",
           "WINDOW_WRITE_CACHE",
           "scratch_file", "levels_file", "count_store_file", "CHECKPOINT_SUFFIX"]
