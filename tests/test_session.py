"""The app's state without Qt (session.py): what the window draws, driven directly."""

from workbench.formats.imagefiles import SourceImage
from workbench.session import PREVIEW_CACHE, Session
from workbench.settings import Settings


def _images(camera, n=3):
    return [SourceImage(f"c{i}.png", camera[: 64 + i, :64]) for i in range(n)]  # scikit-image's 'camera'


def test_opening_images_resets_what_was_computed_for_the_old_ones(camera):
    s = Session()
    s.open_images(_images(camera), folder="frames")
    s.numbers["x"] = 1
    s.remember_preview("k", object())
    s.open_images(_images(camera, 1), bundle_path="b.wbundle")
    assert (s.numbers, dict(s.previews), s.index, s.folder) == ({}, {}, -1, None)
    assert s.source_label == "the decoded images of b.wbundle"


def test_selection_stays_in_range(camera):
    s = Session()
    s.open_images(_images(camera))
    assert s.current is None and s.select(1) and s.current.name == "c1.png"
    assert not s.select(1) and not s.select(7)
    assert s.step_by(+5) and s.index == 2 and not s.step_by(+1)


def test_fitted_previews_are_kept_least_recently_used_first_out():
    s = Session()
    for k in range(PREVIEW_CACHE + 2):
        s.remember_preview(k, object())
    assert list(s.previews) == list(range(2, PREVIEW_CACHE + 2))
    s.remember_preview(2, object())  # used again: now the newest
    assert list(s.previews)[-1] == 2


def test_a_folder_basis_is_marked_missing_until_fitted():
    s = Session()
    folder = Settings(basis_scope="folder")
    assert s.shared_for(Settings()) == (None, None)
    assert s.shared_for(folder) == (None, "missing")
    s.shared[("klt", 8, "420", 64)] = ("basis", "sha")
    assert s.shared_for(folder) == ("basis", "sha")
    assert s.shared_for(Settings(method="conv", basis_scope="folder")) == (None, None)  # no folder fit
