"""workbench: decide how hard a folder of images can be compressed, and with which transform.

Public API::

    data = workbench.compress({"a": array}, method="klt", step=6.0)
    images = workbench.decompress(data)
"""

from .version import __version__  # noqa: E402

from .api import compress, decompress  # noqa: E402
from .errors import BundleError, Cancelled, InputError, WorkbenchError  # noqa: E402
from .settings import Settings  # noqa: E402

__all__ = ["compress", "decompress", "Settings", "WorkbenchError", "InputError", "BundleError", "Cancelled",
           "__version__"]
