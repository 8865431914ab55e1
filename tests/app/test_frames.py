"""The decode-ahead worker's shutdown: its decoders are closed by it, never under a read."""
import threading

from kinemark.app import frames

from .conftest import write_pattern_video


def test_a_worker_stopped_mid_read_closes_its_decoder_only_after_the_read(qtbot, tmp_path, monkeypatch):
    video = write_pattern_video(tmp_path / "p.avi")
    release, reading, log = threading.Event(), threading.Event(), []

    class HeldSource(frames.FrameSource):
        def read(self, index):
            reading.set()
            release.wait(10)                # a read that outlasts close()'s wait
            out = super().read(index)
            log.append("read ended")
            return out

        def close(self):
            log.append("closed")
            super().close()
    monkeypatch.setattr(frames, "FrameSource", HeldSource)
    w = frames.FrameWorker()
    w.register(1, video, "video", {})
    w.ahead([(7, 1, 0)])
    assert reading.wait(10)
    w.close(timeout=0.1)                    # gives up waiting: must not close the decoder
    assert log == []
    release.set()
    w._thread.join(10)
    assert not w._thread.is_alive() and log == ["read ended", "closed"]
