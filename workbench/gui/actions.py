"""The window's long jobs: saving a bundle, opening one, the quality sheet, training, an archive
batch; each a background job with progress and Cancel (see :class:`workbench.gui.worker.JobRunner`)."""

from __future__ import annotations

from pathlib import Path

from PySide6.QtWidgets import QFileDialog

from .. import pipeline
from ..formats import bundle
from . import remote
from ..formats.imagefiles import SourceImage, list_inputs, write_atomic


class JobActions:
    """Mixed into :class:`workbench.gui.window.MainWindow`; uses its panel, session and job runner."""

    # ------------------------------------------------------------------ long jobs
    def _start_job(self, factory, tag, text, child_args=None):
        """Run a core job with progress and Cancel; with ``child_args`` it runs as
        ``factory(*child_args)`` in a child process (heavy jobs such as training)."""
        if self.jobs.active:
            self.status_text.setText("another job is running; cancel it first")
            return False
        self.progress.setValue(0)
        self.progress.show()
        self.cancel_button.show()
        self.status_text.setText(text)
        if child_args is None:
            self.jobs.start(factory, tag)
        else:
            self.jobs.start_child(factory, child_args, tag)
        return True

    def _on_job_progress(self, frac, text):
        self.progress.setValue(int(1000 * frac))
        if text:
            self.status_text.setText(text)

    def _end_job(self):
        self.progress.hide()
        self.cancel_button.hide()

    def _on_job_done(self, tag, result):
        self._end_job()
        kind = tag[0]
        if kind == "save":
            recipe = self._recipes.pop(tag[1], None)
            if recipe is not None:
                from .. import archive

                write_atomic(Path(tag[1]).with_suffix(".wrecipe"), archive.recipe_bytes(recipe),
                             protect=self._protected())
            self.last_saved_bundle = Path(tag[1])  # a sheet of the same settings reuses it
            self.status_text.setText(f"Saved {tag[1]} ({result.size:,} bytes, {len(result.images)} image(s)) "
                                     "and its recipe")
        elif kind == "open":
            contents, decoded = result
            self._show_bundle(tag[1], contents, decoded)
        elif kind == "sheet":
            reused = result["bundle"]["reused_from"]
            self.status_text.setText(f"Quality sheet written to {tag[1]}"
                                     + (f" (the bundle reused from {reused})" if reused else ""))
        elif kind == "train":
            self._on_trained(tag[1], result)
        elif kind == "block":
            from .. import blockchoice

            chosen, costs = result
            self.panel.apply(chosen)
            self.status_text.setText(blockchoice.describe(costs, chosen).capitalize())
        elif kind == "batch":
            self.last_batch = result
            self.status_text.setText(
                f"Archive {tag[1]}: {result['done']} of {result['items']} done, {result['failed']} failed, "
                f"{result['bundle_bytes']:,} bytes" + (f", PSNR mean {result['mean_psnr']:.2f} dB"
                                                       if result["mean_psnr"] is not None else ""))

    def _on_job_failed(self, tag, msg):
        self._end_job()
        self._recipes.pop(tag[1], None)  # a bundle that was not saved gets no recipe
        self.last_error = msg
        if msg == "cancelled":
            self.status_text.setText(self.cancelled_text(tag))
        else:
            self.notice.show_text(f"{tag[0].capitalize()} failed: {msg}")

    @staticmethod
    def cancelled_text(tag) -> str:
        """What a cancelled job left behind: a training keeps its last checkpoint (resumable)."""
        if tag[0] == "train":
            path = Path(tag[1])
            if path.exists():
                return (f"Training cancelled; its last checkpoint is kept as {path} "
                        f"(with {path.name}.state to resume from).")
        return "Cancelled; nothing was written."

    def _protected(self):
        return set(list_inputs([self.folder])) if self.folder else set()

    def save_bundle(self, path) -> bool:
        """Encode the folder with the current settings into ``path`` (a background job)."""
        if not self.images:
            self.notice.show_text("Nothing to save: open a folder first.")
            return False
        s = self.panel.settings()
        images, protect, path = list(self.images), self._protected(), Path(path)
        self._recipes[path] = self._recipe(s)  # written beside the bundle once it is saved

        text = f"saving {path.name}…"
        if remote.handles(s.method):  # torch stays out of this process
            return self._start_job(remote.save_job, ("save", path), text,
                                   child_args=(images, s, path, protect, self.conv_model_file))

        def job():
            result = yield from pipeline.encode_job(images, s, measure=False)
            write_atomic(path, result.data, protect=protect)
            return result

        return self._start_job(job, ("save", path), text)

    def choose_block(self) -> bool:
        """Try every block size (and both chroma samplings, where the method lets them be
        chosen) on the folder and keep the pair of lowest rate–distortion cost at the current
        step (a background job; the panel then shows it)."""
        if not self.images:
            self.notice.show_text("Nothing to choose on: open a folder first.")
            return False
        s = self.panel.settings()
        if not s.traits.uses_block:
            self.notice.show_text(f"The {s.traits.label} has no block size to choose.")
            return False
        images = list(self.images)

        def job():
            from .. import blockchoice
            from ..jobs import Progress

            yield Progress(0, 1, "trying each block size and chroma sampling on the folder…")
            return blockchoice.choose_block(images, s, chromas=None if s.traits.fixed_chroma else ("420", "444"))

        return self._start_job(job, ("block", ""), "choosing the block size…")

    def _ask_save_bundle(self):
        start = str(Path(self.store.value("last_save_dir", str(Path.home()))) / ((self.folder.name if self.folder else "images") + ".wbundle"))
        path, _ = QFileDialog.getSaveFileName(self, "Save bundle", start, "Bundles (*.wbundle)")
        if path:
            self.store.setValue("last_save_dir", str(Path(path).parent))
            self.save_bundle(path)

    def open_bundle(self, path) -> bool:
        path = Path(path)
        try:
            data = path.read_bytes()
        except OSError as exc:
            self.notice.show_text(f"Cannot read {path}: {exc.strerror}")
            return False
        def job():  # the method is read off the GUI thread (parsing checks every CRC)
            if remote.handles(bundle.parse(data).settings.method):  # torch stays out of this process
                return self.jobs.in_child(pipeline.decode_job, (data,))
            return pipeline.decode_job(data)

        return self._start_job(job, ("open", path), f"decoding {path.name}…")

    def _show_bundle(self, path, contents, decoded):
        self.session.open_images([SourceImage(d.name, d.pixels) for d in decoded], bundle_path=path)
        self.panel.apply(contents.settings)
        self._show_images()
        s = contents.settings
        self.notice.show_text(f"Showing the decoded images of {path.name} ({contents.size:,} bytes; {s.describe()}). "
                              "Read-outs now compare with these decoded images, not with the sources.")

    def _ask_bundle(self):
        path, _ = QFileDialog.getOpenFileName(self, "Open bundle", str(Path.home()), "Bundles (*.wbundle)")
        if path:
            self.open_bundle(path)

    def _ask_folder(self):
        path = QFileDialog.getExistingDirectory(self, "Open image folder", str(self.folder or Path.home()))
        if path:
            self.open_folder(path)

    def save_sheet(self, outdir) -> bool:
        try:
            from .. import sheet
        except ImportError:
            self.notice.show_text("The quality sheet is not available in this build.")
            return False
        if not self.images:
            self.notice.show_text("Nothing to report: open a folder first.")
            return False
        s = self.panel.settings()
        images, outdir, protect = list(self.images), Path(outdir), self._protected()
        reuse = [p for p in [self.last_saved_bundle] if p is not None]

        text = "writing the quality sheet…"
        if remote.handles(s.method):  # torch stays out of this process
            return self._start_job(remote.sheet_job, ("sheet", outdir), text,
                                   child_args=(images, s, outdir, protect, self.conv_model_file, reuse))

        def job():
            return (yield from sheet.sheet_job(images, s, outdir, protect=protect, reuse=reuse))

        return self._start_job(job, ("sheet", outdir), text)

    def sheet_folder_suggestion(self) -> Path:
        """A new folder beside the images (``NAME-quality-sheet``, numbered if taken)."""
        base = Path(self.folder) if self.folder else (Path(self.bundle_path).parent if self.bundle_path else Path.home())
        stem = base.parent / f"{base.name}-quality-sheet"
        target, n = stem, 1
        while target.exists() and any(target.iterdir()):
            n += 1
            target = stem.with_name(f"{stem.name}-{n}")
        return target

    def _ask_save_sheet(self):
        # A file dialog that names a folder still to be made: the suggestion is created on accept.
        suggestion = self.sheet_folder_suggestion()
        path, _ = QFileDialog.getSaveFileName(self, "New folder for the quality sheet", str(suggestion),
                                              "Folders (*)", options=QFileDialog.Option.DontConfirmOverwrite)
        if path:
            Path(path).mkdir(parents=True, exist_ok=True)
            self.save_sheet(path)

    def _recipe(self, s) -> dict:
        """The recipe of setting ``s`` here: a model trained in this window is referred to by hash."""
        from .. import archive
        from .training import METHOD

        ref = None
        if s.method == METHOD and self.conv_model_file is not None:
            from ..formats.modelfile import read_model

            ref = read_model(self.conv_model_file).sha256
        return archive.make_recipe(s, "model" if ref else None, ref)

    def show_archive_summary(self, dst) -> str:
        """The one-screen summary of a finished (or interrupted) batch output folder."""
        from .. import archive

        s = archive.summary(dst)
        text = (f"{s['done']} of {s['items']} items done, {s['failed']} failed; {s['source_bytes']:,} bytes of "
                f"sources -> {s['bundle_bytes']:,} bytes of bundles"
                + (f" ({s['ratio']:.1f} : 1)" if s["ratio"] else "")
                + (f"; PSNR mean {s['mean_psnr']:.2f} dB, lowest {s['min_psnr']:.2f} dB" if s["mean_psnr"] else "")
                + "".join(f"\nfailed: {f['path']}: {f['error']}" for f in s["failures"][:10]))
        self.notice.show_text(text)
        return text

    def _ask_archive_summary(self):
        from .. import archive

        dst = QFileDialog.getExistingDirectory(self, "A batch output folder", str(self.folder or Path.home()))
        if dst and (Path(dst) / archive.MANIFEST).exists():
            self.show_archive_summary(dst)
        elif dst:
            self.notice.show_text(f"{dst}: no {archive.MANIFEST} here; not a batch output folder")

    def apply_to_archive(self, src, dst) -> bool:
        """Start a batch of ``src`` into ``dst`` with the current setting, in a child process."""
        from .. import archive

        recipe = self._recipe(self.panel.settings())
        if recipe["shared"]:  # a model trained here travels along
            archive.store_shared(Path(dst), "model", Path(self.conv_model_file).read_bytes(), recipe["shared"]["sha256"])
        return self._start_job(archive.batch_job, ("batch", Path(dst)), f"compressing {Path(src).name}…",
                               child_args=(str(src), str(dst), recipe))

    def _ask_archive(self):
        src = QFileDialog.getExistingDirectory(self, "Archive to compress (searched recursively)",
                                               str(self.folder or Path.home()))
        if not src:
            return
        dst = QFileDialog.getExistingDirectory(self, "Folder for the bundles and the manifest", str(Path(src).parent))
        if dst:
            self.apply_to_archive(src, dst)

    def _ask_train(self):
        from . import training

        training.ask_and_train(self)

    def _on_trained(self, path, result):
        from ..formats.modelfile import read_model

        # Only its description is read now (no torch): the model itself is loaded by the
        # first job that needs it.
        self.status_text.setText(f"Trained {path}; reading it…")
        self.model_lane.submit(lambda: (path, result, read_model(path)), tag=path)

    def _on_model_loaded(self, path, result, loaded):
        from . import training

        training.on_trained(self, path, result, loaded)

