"""The app's state without Qt: what is open, which image is shown, and what has been computed.

The window observes a :class:`Session` and draws it; tests can drive one directly. It holds
the images of a folder (or of an opened bundle), the shown index, the fitted previews (a few,
least recently used dropped), the read-outs computed per setting, the folder-fitted shared
sides, and the last results the window reported.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path

from .formats.imagefiles import SourceImage
from .settings import Settings

PREVIEW_CACHE = 3  # fitted images kept: each holds its analysis (patches or latents)


@dataclass
class Session:
    folder: Path | None = None
    bundle_path: Path | None = None  # set when the images are an opened bundle's decoded ones
    images: list[SourceImage] = field(default_factory=list)
    index: int = -1
    previews: OrderedDict = field(default_factory=OrderedDict)  # (name, method, block, ...) -> preview
    numbers: dict = field(default_factory=dict)  # (name, settings key) -> preview.Numbers
    shared: dict = field(default_factory=dict)  # (method, block, chroma, kept) -> (shared, sha256)
    conv_model_file: Path | None = None  # a model trained here; None for the shipped one
    last_numbers: object | None = None
    last_measured: object | None = None
    last_training: dict | None = None
    last_batch: dict | None = None
    last_error: str = ""

    @property
    def current(self) -> SourceImage | None:
        return self.images[self.index] if 0 <= self.index < len(self.images) else None

    @property
    def source_label(self) -> str:
        """What the read-outs compare with: the sources, or an opened bundle's decoded images."""
        return "the source" if self.bundle_path is None else f"the decoded images of {Path(self.bundle_path).name}"

    def open_images(self, images: list[SourceImage], *, folder=None, bundle_path=None) -> None:
        """Show a new set of images; everything computed for the old ones is dropped."""
        self.images = list(images)
        self.folder = None if folder is None else Path(folder)
        self.bundle_path = None if bundle_path is None else Path(bundle_path)
        self.index = -1
        self.previews.clear()
        self.shared.clear()
        self.numbers.clear()

    def select(self, row: int) -> bool:
        """Show image ``row``; False when it is out of range or already shown."""
        if not (0 <= row < len(self.images)) or row == self.index:
            return False
        self.index = row
        return True

    def step_by(self, delta: int) -> bool:
        return bool(self.images) and self.select(min(len(self.images) - 1, max(0, self.index + delta)))

    def remember_preview(self, key, prev) -> None:
        self.previews[key] = prev
        self.previews.move_to_end(key)
        while len(self.previews) > PREVIEW_CACHE:
            self.previews.popitem(last=False)

    def shared_for(self, s: Settings):
        """The folder-fitted shared side for ``s``, ``(None, None)`` when none applies, or
        ``(None, "missing")`` when it must be fitted first."""
        if s.basis_scope != "folder" or not s.traits.folder_scope:
            return None, None
        return self.shared.get((s.method, s.block, s.chroma, s.kept), (None, "missing"))

    def numbers_key(self, img: SourceImage, s: Settings):
        return img.name, s.cache_key()
