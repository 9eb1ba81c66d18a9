"""A tifffile hook shared by the interrupt tests (``test_run.py``, ``test_run_pool.py``).

``BLOCKING_WRITE`` is Python source run in a child process: the write of level 0 of the ROI
named by the environment variable ``BLOCK_ROI`` stops half way through its tiles, writes
``<pid> <path of the file being written>`` into the file ``BLOCK_MARKER`` and waits until a
signal ends it (SIGKILL, or SIGINT's KeyboardInterrupt)."""

import textwrap

BLOCKING_WRITE = textwrap.dedent("""
    import os, threading
    from pathlib import Path
    import numpy as np
    import tifffile

    real_write = tifffile.TiffWriter.write

    def tiles(data, tile):
        for c in range(data.shape[0]):
            for y in range(0, data.shape[1], tile[0]):
                for x in range(0, data.shape[2], tile[1]):
                    yield np.ascontiguousarray(data[c, y:y + tile[0], x:x + tile[1]])

    def blocking_write(self, data, *args, **kwargs):
        path = self._fh.path
        block = os.environ.get("BLOCK_ROI")
        if not block or not Path(path).name.startswith("." + block) or kwargs.get("subfiletype"):
            return real_write(self, data, *args, **kwargs)
        if isinstance(data, np.ndarray):
            kwargs.update(shape=data.shape, dtype=data.dtype)
            data = tiles(data, kwargs["tile"])
        total = kwargs["shape"][0] * -(-kwargs["shape"][1] // kwargs["tile"][0]) \\
            * -(-kwargs["shape"][2] // kwargs["tile"][1])

        def half_then_block():
            for k, tile in enumerate(data):
                if k == total // 2:
                    Path(os.environ["BLOCK_MARKER"]).write_text(f"{os.getpid()} {path}")
                    threading.Event().wait()
                yield tile

        return real_write(self, half_then_block(), *args, **kwargs)

    tifffile.TiffWriter.write = blocking_write
""")
