"""Files on disk, one module per purpose (base layer: imports nothing of factorize but the errors).

- :mod:`factorize.storage.headers`: safetensors headers parsed and checked before any tensor is read, the
  deterministic writer, one-tensor reads.
- :mod:`factorize.storage.atomic`: atomic, exclusive outputs (temporary names beside the output, renamed into
  place), temporary directories, clean-up of what killed writers left.
- :mod:`factorize.storage.disk`: free-space checks before writing, byte counts for people.
- :mod:`factorize.storage.proc`: reads of Linux's /proc (single fields, peak resident memory).

The names below are re-exported so callers write ``from factorize.storage import publish``.
"""

from factorize.storage.atomic import (
    TEMP_DIR_SUFFIX,
    TEMP_SUFFIX,
    check_output_path,
    create_temp,
    create_temp_dir,
    new_temp_dir,
    process_alive,
    publish,
    publish_dir,
    remove_quietly,
    remove_stale_dirs,
    remove_stale_temps,
    write_atomic,
)
from factorize.storage.disk import DISK_MARGIN_BYTES, check_free_space, human_bytes
from factorize.storage.headers import (
    DTYPE_NAMES,
    DTYPES,
    MAX_HEADER_BYTES,
    Header,
    TensorInfo,
    check_readable_file,
    check_safetensors,
    read_header,
    read_rows,
    read_safetensors,
    read_tensor,
    safetensors_header,
    write_safetensors,
)
from factorize.storage.proc import peak_rss, proc_field, reset_peak_rss, return_freed_memory

__all__ = [
    "DISK_MARGIN_BYTES", "DTYPES", "DTYPE_NAMES", "MAX_HEADER_BYTES", "TEMP_DIR_SUFFIX", "TEMP_SUFFIX", "Header",
    "TensorInfo", "check_free_space", "check_output_path", "check_readable_file", "check_safetensors", "create_temp",
    "create_temp_dir", "human_bytes", "new_temp_dir", "peak_rss", "proc_field", "process_alive",
    "publish", "publish_dir", "read_header", "read_rows", "read_safetensors", "read_tensor", "remove_quietly",
    "remove_stale_dirs", "remove_stale_temps", "reset_peak_rss", "return_freed_memory", "safetensors_header",
    "write_atomic", "write_safetensors",
]
