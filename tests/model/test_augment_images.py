"""The images mode of head training: joint flips/turns of images and masks, then the encoder."""

import numpy as np
import torch
from torchvision import tv_tensors

from labeler.model.augment_images import RandomQuarterTurn, image_augmentation, image_batch
from tests.common import zoo_four_classes


def test_augmentation_moves_image_and_mask_together_without_interpolation():
    torch.manual_seed(0)
    rng = np.random.default_rng(1)
    mask = np.kron(zoo_four_classes(), np.ones((2, 2), np.uint8))  # 16 x 16, four quadrants
    mask[0, 0] = 255
    image = np.zeros((3, 16, 16), np.uint8)
    image[1] = mask * 40  # green channel encodes the class
    image[0] = rng.integers(0, 50, (16, 16))
    aug = image_augmentation()
    for _ in range(12):
        im, mk = aug(
            tv_tensors.Image(torch.from_numpy(image)), tv_tensors.Mask(torch.from_numpy(mask))
        )
        assert isinstance(mk, tv_tensors.Mask) and mk.dtype == torch.uint8
        m = mk.numpy()
        # the mask is only moved: same multiset of values, no interpolated values
        np.testing.assert_array_equal(np.sort(m.ravel()), np.sort(mask.ravel()))
        # it moved exactly like the image: one of the 8 flips/turns of the original
        options = [np.rot90(mask, k) for k in range(4)] + [
            np.fliplr(np.rot90(mask, k)) for k in range(4)
        ]
        assert any(np.array_equal(m, o) for o in options)


def test_quarter_turn_keeps_non_square_shapes():
    torch.manual_seed(3)
    turn = RandomQuarterTurn()
    mask = tv_tensors.Mask(torch.arange(6, dtype=torch.uint8).reshape(2, 3))
    for _ in range(8):
        assert tuple(turn(mask).shape) == (2, 3)


def test_image_batches_pass_the_augmented_image_to_the_encoder():
    masks = [np.kron(zoo_four_classes(), np.ones((4, 4), np.uint8))]  # 32 x 32, four classes
    image = np.zeros((32, 32, 3), np.uint8)
    image[..., 1] = masks[0] * 40 + 20
    seen = []

    def encoder(x):  # records its input; one level per stride, each the input's mean
        seen.append(x.clone())
        return tuple(x.mean(dim=1, keepdim=True)[..., ::s, ::s] for s in (4, 8, 16, 32))

    torch.manual_seed(2)
    levels, target, pixels = image_batch([0, 0], [image], masks, image_augmentation(), encoder)
    assert pixels.dtype == torch.uint8 and tuple(pixels.shape) == (2, 3, 32, 32)
    torch.testing.assert_close(seen[0], pixels.to(torch.float32), rtol=0, atol=0)
    assert [tuple(t.shape) for t in levels] == [
        (2, 1, 8, 8),
        (2, 1, 4, 4),
        (2, 1, 2, 2),
        (2, 1, 1, 1),
    ]
    for b in range(2):  # each mask is one of the 8 flips/turns of the zoo mask
        options = [np.rot90(masks[0], k) for k in range(4)]
        options += [np.fliplr(o) for o in options]
        assert any(np.array_equal(target[b].numpy(), o) for o in options)
