"""The golden copy's comparison forgives a library's last-digit drift, and nothing a person reads."""

from __future__ import annotations

from tests.golden import same_but_last_digits


def test_a_last_digit_drift_of_an_unrounded_number_is_forgiven():
    assert same_but_last_digits('{"se": 0.07814969284, "v": 6.05}', '{"se": 0.07814969283, "v": 6.05}')
    assert same_but_last_digits("1264.512495,0.361265516", "1264.512495,0.3612655161")


def test_a_changed_digit_a_person_reads_or_a_changed_word_is_not():
    assert not same_but_last_digits('{"reported": "6.05"}', '{"reported": "6.06"}')
    assert not same_but_last_digits('{"se": 0.0781496928}', '{"se": 0.0781497928}')  # 1.3 parts in 10⁶
    assert not same_but_last_digits('{"verdict": "pass", "v": 1.5}', '{"verdict": "fail", "v": 1.5}')
    assert not same_but_last_digits("1.5,2.5", "1.5,2.5,3.5")
