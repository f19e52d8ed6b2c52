"""Regenerate the bundled demo audio (seeded: the same bits every time).

    python demo_audio/make_demo_audio.py
"""

from pathlib import Path

from requant.demo import synthesize_demo_audio

if __name__ == "__main__":
    here = Path(__file__).resolve().parent
    for name in synthesize_demo_audio(here):
        print(here / name)
