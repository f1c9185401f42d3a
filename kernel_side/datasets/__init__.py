"""Data sets: the built-in ones (seeded, no downloads) and loaders for your own files.

Built in: ``moons``, ``circles``, ``spirals`` (2-D toys), ``digits`` (scikit-learn's bundled
copy of the UCI Optical Recognition of Handwritten Digits data, test part: 1,797 8x8
images), the scenario's ``leak_alarm``, and ``meter_cards`` (those digits redrawn at
scanner resolution, grey or colour). Your own data: ``from_arrays``, ``from_npz``,
``from_idx``, ``from_folder`` and ``from_torch``. No loader downloads anything. Images are
flattened in ``(C, H, W)`` order, scaled to [0, 1], and keep their shape in
``Dataset.image_shape``.
"""
from jostle.datasets.builtin import (
    LEAK_ALARM_CENTRE,
    LEAK_ALARM_FEATURES,
    LEAK_ALARM_SCALE,
    LEAK_ALARM_SIGN,
    TEST_SEED_OFFSET,
    circles,
    digits,
    leak_alarm,
    moons,
    spirals,
)
from jostle.datasets.dataset import Dataset, from_arrays
from jostle.datasets.folder import from_folder
from jostle.datasets.idx import from_idx
from jostle.datasets.npz import from_npz
from jostle.datasets.scanned_digits import meter_cards
from jostle.datasets.torch_data import from_torch

__all__ = [
    "Dataset", "moons", "circles", "spirals", "digits", "leak_alarm", "meter_cards", "from_arrays",
    "from_npz", "from_idx", "from_folder", "from_torch", "TEST_SEED_OFFSET",
    "LEAK_ALARM_CENTRE", "LEAK_ALARM_SCALE", "LEAK_ALARM_SIGN", "LEAK_ALARM_FEATURES",
]
