"""Images every machine of a team finds: kept under a shared image root by SHA-256,
checked by hash on read (on SQLite and PostgreSQL; both "machines" are folders here, the
second reaching the root through a link of its own, as another mount point would).

SHA-256 reference values come from Python's ``hashlib`` (FIPS 180-4), never from the
code under test.
"""

import hashlib
import shutil

import numpy as np
import pytest

from labeler.cli import main
from labeler.errors import InputError
from labeler.imagery.intake import ROOT_PREFIX, root_image_path
from labeler.imagery.write import write_png
from labeler.project import init_project, join_project, open_project
from labeler.workflow import add_images, export_project, project_status, save_tile_mask

ROOT_LINE = '# image_root = "/mnt/farm-images"'


def _set_root(folder, root):
    """This machine's settings file names where it mounts the shared image folder."""
    path = folder / "labeler.toml"
    text = path.read_text()
    assert ROOT_LINE in text
    path.write_text(text.replace(ROOT_LINE, f'image_root = "{root}"'))


def _machines(tmp_path, url, *, root=True):
    """Two working folders ("office", "barn") of one project; the barn's mount is a link."""
    shared = tmp_path / "shared-images"
    shared.mkdir()
    (tmp_path / "barn-mount").symlink_to(shared)
    if root:  # the office names its mount at init, the barn as it joins (the command)
        init_project(tmp_path / "office", store_url=url, image_root=shared).close()
        assert main(["join", str(tmp_path / "barn"), "--store", url,
                     "--image-root", str(tmp_path / "barn-mount")]) == 0
        text = (tmp_path / "barn" / "labeler.toml").read_text()
        assert f'image_root = "{tmp_path / "barn-mount"}"' in text
    else:
        init_project(tmp_path / "office", store_url=url).close()
        join_project(tmp_path / "barn", store_url=url).close()
    return tmp_path / "office", tmp_path / "barn", shared


def _picture(path, seed, shape=(200, 300, 3)):
    write_png(path, np.random.default_rng(seed).integers(0, 256, shape, dtype=np.uint8))
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def url(store_url, monkeypatch):
    monkeypatch.delenv("LABELER_STORE_URL", raising=False)
    monkeypatch.delenv("LABELER_STORE_IMAGE_ROOT", raising=False)
    return store_url


def test_an_image_added_on_one_machine_is_found_on_another(tmp_path, url):
    office, barn, shared = _machines(tmp_path, url)
    sha = _picture(tmp_path / "east-block.png", 1)
    with open_project(office) as p:
        [res] = add_images(p, [tmp_path / "east-block.png"])
        image = p.store.images()[0]
    assert res.status == "added" and image.sha256 == sha
    assert image.path == ROOT_PREFIX + f"{sha[:2]}/{sha}.png"
    assert (shared / sha[:2] / f"{sha}.png").read_bytes() == (tmp_path / "east-block.png").read_bytes()
    assert image.size == (tmp_path / "east-block.png").stat().st_size
    assert not any((office / "images").glob("*.png"))  # no second copy in the folder
    # the barn has the same photo in a folder of its own: same content, already there
    (tmp_path / "barn-card").mkdir()
    shutil.copy(tmp_path / "east-block.png", tmp_path / "barn-card" / "IMG_0412.png")
    other = _picture(tmp_path / "barn-card" / "east-block.png", 2)  # same name, other pixels
    with open_project(barn) as p:
        same, new = add_images(p, [tmp_path / "barn-card" / "IMG_0412.png",
                                   tmp_path / "barn-card" / "east-block.png"])
        assert same.status == "skipped" and same.name == "east-block"
        assert same.message.endswith("already in the project as 'east-block' (same content)")
        assert new.status == "added" and new.name == "east-block-2"  # the hash decides
        assert p.image_path(p.store.image_by_name("east-block")) == (
            tmp_path / "barn-mount" / root_image_path(sha, ".png"))
        assert p.store.image_by_name("east-block-2").sha256 == other
        tile = p.store.tiles(image_id=image.id)[0]
        save_tile_mask(p, tile.id, "ines", np.ones(tile.shape, np.uint8), parent_version=None)
        # the export reads the pixels (for its previews) through the barn's mount
        result = export_project(p, tmp_path / "barn-export", formats="masks")
    assert result.images == 1 and (tmp_path / "barn-export" / "masks" / "east-block.png").is_file()
    with open_project(barn) as p:
        assert project_status(p).image_root == tmp_path / "barn-mount"


def test_a_changed_file_under_the_root_is_refused(tmp_path, url, monkeypatch):
    office, barn, shared = _machines(tmp_path, url)
    sha = _picture(tmp_path / "east-block.png", 1)
    with open_project(office) as p:
        add_images(p, [tmp_path / "east-block.png"])
    kept = shared / root_image_path(sha, ".png")
    import labeler.project as project_module

    hashed = []
    real = project_module.sha256_file
    monkeypatch.setattr(project_module, "sha256_file", lambda f: hashed.append(f) or real(f))
    with open_project(barn) as p:
        image = p.store.images()[0]
        p.image_path(image)
        p.image_path(image)
    with open_project(barn) as p:  # a later command: remembered by size, time and inode
        p.image_path(image)
    assert len(hashed) == 1  # hashed once on this machine
    data = bytearray(kept.read_bytes())
    data[-20] ^= 0xFF  # same size, other content
    kept.write_bytes(bytes(data))
    with open_project(barn) as p, pytest.raises(
        InputError, match=r"was kept under the shared image root, but the file has changed since \(SHA-256"
    ):
        p.image_path(image)
    kept.write_bytes(bytes(data) + b"\0")  # another size: known changed without a hash
    hashed.clear()
    with open_project(barn) as p, pytest.raises(
        InputError, match=rf"has changed since \({len(data) + 1} bytes, added as {len(data)} bytes\)"
    ):
        p.image_path(image)
    assert hashed == []


def test_a_machine_without_the_root_setting_is_told_what_to_set(tmp_path, url):
    office, barn, shared = _machines(tmp_path, url)
    _picture(tmp_path / "east-block.png", 1)
    with open_project(office) as p:
        add_images(p, [tmp_path / "east-block.png"])
    text = (barn / "labeler.toml").read_text()
    (barn / "labeler.toml").write_text(text.replace("\nimage_root =", "\n# image_root ="))
    with open_project(barn) as p, pytest.raises(
        InputError, match=r"image 'east-block': kept under the team's image root, which is not set "
        r"on this machine; set store.image_root"
    ):
        p.image_path(p.store.images()[0])


def test_an_image_of_another_machines_folder_is_shared_by_adding_it_again(tmp_path, url):
    """Added before the team had a root: the barn cannot reach the office's images/."""
    office, barn, shared = _machines(tmp_path, url, root=False)
    sha = _picture(tmp_path / "east-block.png", 1)
    with open_project(office) as p:
        add_images(p, [tmp_path / "east-block.png"])
        image = p.store.images()[0]
    assert image.path == "images/east-block.png"
    _set_root(barn, tmp_path / "barn-mount")
    with open_project(barn) as p:
        assert not p.image_path(image).exists()  # the office's folder is not here
        [res] = add_images(p, [tmp_path / "east-block.png"])
        assert res.status == "skipped"
        assert res.message.endswith("(same content); put under the shared image root for the team")
        assert p.image_path(image) == tmp_path / "barn-mount" / sha[:2] / f"{sha}.png"
