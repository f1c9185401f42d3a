"""The map's predicted trait (the text of its ARIA description) follows the computed view."""
from __future__ import annotations

import torch

from jostle.widgets import Explorer


def test_map_states_the_predicted_class_of_the_computed_input(ens, moons):
    explorer = Explorer(ens, moons, budget=0.2, steps=4, grid=8, boundaries=1)
    try:
        assert explorer.wait(60)
        for point in ([0.0, 0.5], [1.5, -0.3]):
            explorer._map.set_state({"point": point})  # what a click or an arrow key sends
            assert explorer.wait(60)
            # Reference: the ensemble's own predictive at that input (probabilities averaged
            # over members; Ensemble.predict), formatted as the description shows it.
            probs = ens.predict(torch.tensor([point])).probs[0]
            label = int(torch.argmax(probs))
            names = explorer.result.classes
            assert explorer._map.predicted == f"{names[label]} (p = {float(probs[label]):.2f})"
            assert explorer._map.ball_centre == point  # the input the description names
    finally:
        explorer.close()
