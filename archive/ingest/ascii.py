"""Byte values of the characters the compiled NMEA reader tests (it compares raw bytes as
integers): punctuation of NMEA 0183 sentences and the letters of sentence types and modes."""

from __future__ import annotations

TAB, LF, CR, SPACE = 9, 10, 13, 32
DOLLAR, STAR, PLUS, COMMA, MINUS, DOT = 36, 42, 43, 44, 45, 46  # $ * + , - .
A, C, D, E, F, G, L, M, N, P, R, S, V, Z = (ord(c) for c in "ACDEFGLMNPRSVZ")
