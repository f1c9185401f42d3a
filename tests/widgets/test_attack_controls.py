"""The attack controls take their method, norm and objective choices from the attack registry."""
from __future__ import annotations

from jostle.attacks.run import attack_choices
from jostle.widgets import Explorer
from jostle.widgets.attack_controls import AttackControls


def test_controls_offer_the_registered_attacks_with_their_norms():
    attacks = AttackControls().get_state()["attacks"]  # the synced trait the view reads
    assert list(attacks) == ["fgsm", "pgd", "cw", "spsa", "square"]
    assert attacks["cw"]["norms"] == ["2"] and attacks["cw"]["objectives"] == ["margin"]
    assert attacks == attack_choices()


def test_a_registered_attack_appears_in_the_explorer_and_runs_there(ens, moons, random_sign_attack):
    assert AttackControls().attacks["random_sign"]["norms"] == ["inf"]
    ex = Explorer(ens, moons, budget=0.2, steps=2, grid=0, method=random_sign_attack, objective="margin")
    try:
        assert ex.wait(60)
        assert "random_sign" in ex._controls.attacks
        assert ex.status[0] == "idle" and ex.result.attack is not None
        assert ex.result.state.method == "random_sign"
    finally:
        ex.close()
