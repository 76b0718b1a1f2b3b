"""The workbench's exception hierarchy: every error a user can cause is a ``ValueError``."""


class WorkbenchError(ValueError):
    """Base class of every error the workbench raises for bad input."""


class InputError(WorkbenchError):
    """An image, folder or argument that cannot be used as given."""


class BundleError(WorkbenchError):
    """A bundle, basis or model file that is truncated, corrupted or not ours."""


class Cancelled(Exception):
    """A long job was stopped by its caller (not an input error)."""
