"""``python -m xo_fit``: the ``xo-fit`` command line (:func:`xo_fit.cli.app.run`).

Importing this module runs the command line on ``sys.argv``; it defines nothing public.
"""

import os
import sys

try:
    from xo_fit.cli.app import run
except KeyboardInterrupt:  # Ctrl-C while the program is still being imported: nothing begun, nothing lost
    sys.stderr.write("xo-fit: interrupted\n")
    sys.stderr.flush()
    os._exit(130)

run()
