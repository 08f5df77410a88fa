"""Everything that touches files: raw-file readers and writers (the store lives in ``store``,
its staged parts in ``staging``, the fast frame I/O in ``h5grid``).

The public reading API is :func:`read_file` (one file -> validated raw dataset) and
:func:`find_inputs` (a run folder -> its input files); readers are looked up by suffix in a
registry that plug-ins extend through the entry-point group ``isogap.readers``.
"""

from pipeline.io.readers import (
    BUILTIN_READERS,
    ENTRY_POINT_GROUP,
    Reader,
    clear_reader_registry,
    file_sha256,
    find_inputs,
    get_readers,
    read_file,
    reader_for,
    register_reader,
)
from pipeline.io.writers import write_netcdf, write_raw_netcdf, write_raw_npz, write_raw_textgrid

__all__ = [
    "BUILTIN_READERS",
    "ENTRY_POINT_GROUP",
    "Reader",
    "clear_reader_registry",
    "file_sha256",
    "find_inputs",
    "get_readers",
    "read_file",
    "reader_for",
    "register_reader",
    "write_netcdf",
    "write_raw_netcdf",
    "write_raw_npz",
    "write_raw_textgrid",
]
