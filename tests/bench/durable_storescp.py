"""pynetdicom's ``storescp`` app with one change: each object it writes is made durable
(the file and its folder fsync'ed) before the C-STORE response, as diastolic-sr's receiver
does.  A reference receiver for the bench: what the durability rule alone costs a bare
pynetdicom receiver on this machine.

    python durable_storescp.py PORT -aet AE -od FOLDER [other storescp options]
"""

from __future__ import annotations

import os
import re
import sys
from typing import Any

from pynetdicom.apps.common import SOP_CLASS_PREFIXES
from pynetdicom.apps.common import handle_store as app_handle_store
from pynetdicom.apps.storescp import storescp


def _fsync(path: str, flags: int = os.O_RDONLY) -> None:
    fd = os.open(path, flags)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def handle_store(event: Any, args: Any, app_logger: Any) -> Any:
    """The app's own handler, then the file it wrote and its folder fsync'ed."""
    status = app_handle_store(event, args, app_logger)
    code = status if isinstance(status, int) else getattr(status, "Status", None)
    if code == 0x0000 and args.output_directory is not None:
        ds = event.dataset
        prefix = SOP_CLASS_PREFIXES.get(ds.SOPClassUID, ("UN",))[0]
        uid = re.sub(r"[^\d.]", "_", ds.SOPInstanceUID)  # as the app names its files
        name = f"{prefix}.{uid}"
        _fsync(os.path.join(args.output_directory, name))
        _fsync(args.output_directory)
    return status


if __name__ == "__main__":
    storescp.handle_store = handle_store  # main() builds its handlers from this name
    storescp.main(sys.argv[1:])
