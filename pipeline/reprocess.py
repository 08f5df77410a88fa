"""Re-running a store from the source files it records (``isogap reprocess``)."""

from __future__ import annotations

import os
import tomllib
from collections.abc import Callable
from pathlib import Path

from pipeline.batch import Event, RunSummary, run_batch
from pipeline.config import load_config, parse_config, with_run_overrides
from pipeline.errors import InputError, StoreError
from pipeline.io.readers import file_sha256
from pipeline.io.store import open_store

__all__ = ["reprocess_store"]


def reprocess_store(
    store: str | os.PathLike[str],
    *,
    config_path: str | os.PathLike[str] | None = None,
    out_store: str | os.PathLike[str] | None = None,
    workers: int | None = None,
    on_event: Callable[[Event], None] | None = None,
) -> RunSummary:
    """Re-run the inputs recorded in ``store`` with its stored config, or ``config_path``.

    Every source file must still exist with the hash recorded in the store; a moved or changed
    file is a clear error before any work. The new store records the previous config's hash
    (``previous_config_sha256``) beside its own ``config_sha256``.
    """
    st = open_store(store)
    run = st.run()
    if "input_file" not in run:
        raise StoreError(f"store {store}: records no input list; it cannot be reprocessed")
    files = [str(f) for f in run["input_file"].values]
    hashes = [str(h) for h in run["input_sha256"].values]
    # inputs that failed last time are tried again (they may have been fixed); no hash to check
    for f in st.failures():
        if f.file not in files and Path(f.file).is_file():
            files.append(f.file)
            hashes.append("")
    problems = []
    sides = ([str(h) for h in run["input_sidecar_sha256"].values]
             if "input_sidecar_sha256" in run else [""] * len(hashes))
    sides += [""] * (len(files) - len(sides))
    for f, h, sh in zip(files, hashes, sides, strict=True):
        p = Path(f)
        if not p.is_file():
            problems.append(f"{f}: source file is missing (moved or deleted)")
        elif h and file_sha256(p) != h:
            problems.append(f"{f}: source file changed since the store was made (hash differs)")
        elif sh and file_sha256(p.with_suffix(".toml")) != sh:
            problems.append(f"{f}: its sidecar {p.with_suffix('.toml').name} changed since the "
                            "store was made (hash differs)")
    if problems:
        raise InputError(f"store {store}: cannot reprocess:\n  " + "\n  ".join(problems))
    stored_toml = str(run.attrs.get("config_toml", ""))
    if config_path is not None:
        cfg = load_config(config_path)
    elif not stored_toml.strip():
        raise StoreError(f"store {store}: records no config; pass one with --config")
    else:
        cfg = parse_config(tomllib.loads(stored_toml), source=f"{store} (stored config)")
    cfg = with_run_overrides(cfg, workers=workers)
    target = Path(out_store) if out_store is not None else Path(store)
    run_dir = Path(files[0]).parent if files else Path(".")
    return run_batch(run_dir, target, cfg, inputs=[Path(f) for f in files],
                     on_event=on_event,
                     history=f"isogap reprocess {store}",
                     extra_run_attrs={"previous_config_sha256":
                                      str(run.attrs.get("config_sha256", ""))})
