"""Scorers named by dotted path in tests (``evaluate.scorer=user_scorers:NAME``)."""

import zlib


def longer(prompt, response: str) -> float:
    """Prefers longer responses: the number of words."""
    return float(len(response.split()))


def shorter(prompt, response: str) -> float:
    return -float(len(response.split()))


def hashed(prompt, response: str) -> float:
    """A fixed pseudo-random score of the text (CRC-32), so that wins, defeats and ties all occur."""
    return float(zlib.crc32(response.encode()) % 7)


def one_argument(response):
    return 0.0


def not_a_number(prompt, response):
    return "high"
