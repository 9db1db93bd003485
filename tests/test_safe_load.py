"""Loading a checkpoint or saved result never runs code from the file.

A crafted file carries an object whose ``__reduce__`` asks the unpickler to call ``exec`` (the
classic pickle attack, described in the Python ``pickle`` module documentation's warning). Loading it
through stein_torch must fail with a clear ValueError and must not create the marker file that the
payload writes; loading it with an unrestricted unpickler does create it, which shows the file is a
working attack and the test can fail.
"""

import pickle

import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as hst

import stein_torch as st
from stein_torch import io as st_io


class Payload:
    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (exec, (f"open({self.marker!r}, 'w').write('code ran')",))


def target():
    return st.Target(lambda x: -0.5 * (x**2).sum(-1), dim=2)


@pytest.fixture
def crafted(tmp_path):
    marker = tmp_path / "marker"
    good = tmp_path / "good.pt"
    st.svgd(target(), 6, 2, seed=0, checkpoint=good)
    state = torch.load(good, weights_only=True)
    state["components"]["kernel"] = Payload(marker)  # looks like a checkpoint, with a payload inside
    path = tmp_path / "crafted.pt"
    torch.save(state, path)
    return path, marker


def test_resume_refuses_a_crafted_checkpoint_without_running_it(crafted):
    path, marker = crafted
    with pytest.raises(ValueError, match=r"resume: refusing to load .*could run code"):
        st.svgd(target(), 6, 4, seed=0, resume=path)
    with pytest.raises(ValueError, match=r"path: refusing to load"):
        st.load(path, target())
    with pytest.raises(ValueError, match=r"resume: refusing to load"):
        st_io.load_checkpoint(path)
    assert not marker.exists()
    # control: an unrestricted load of the same file runs the payload
    torch.load(path, weights_only=False)
    assert marker.read_text() == "code ran"


def test_a_plain_pickle_file_is_refused_too(tmp_path):
    marker = tmp_path / "marker"
    path = tmp_path / "plain.pkl"
    with open(path, "wb") as f:
        pickle.dump({"format": "stein_torch.checkpoint", "x": Payload(marker)}, f)
    with pytest.raises(ValueError, match=r"resume: (refusing to load|.* is not a readable stein_torch file)"):
        st.svgd(target(), 6, 4, seed=0, resume=path)
    assert not marker.exists()
    with open(path, "rb") as f:  # control: plain unpickling runs it
        pickle.load(f)
    assert marker.exists()


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(junk=hst.binary(max_size=300), cut=hst.floats(0.0, 0.99))
def test_junk_and_truncated_files_give_a_clear_error(tmp_path, junk, cut):
    good = tmp_path / "good.pt"
    if not good.exists():
        st.svgd(target(), 6, 2, seed=0, checkpoint=good)
    data = good.read_bytes()
    for name, content in (("junk.pt", junk), ("cut.pt", data[: int(cut * len(data))])):
        path = tmp_path / name
        path.write_bytes(content)
        with pytest.raises(ValueError, match=r"^resume: "):
            st_io.load_checkpoint(path)


def test_files_of_the_wrong_kind_are_named(tmp_path):
    path = tmp_path / "tensor.pt"
    torch.save(torch.zeros(3), path)
    with pytest.raises(ValueError, match=r"resume: .* is not a stein_torch stein_torch.checkpoint file"):
        st_io.load_checkpoint(path)
    torch.save({"format": "stein_torch.checkpoint", "version": 99}, path)
    with pytest.raises(ValueError, match=r"format version 99"):
        st_io.load_checkpoint(path)
    with pytest.raises(FileNotFoundError, match="resume: no file"):
        st.svgd(target(), 6, 4, resume=tmp_path / "missing.pt")
