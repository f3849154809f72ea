"""Regenerate the sample grids in this folder: python sample_grids/make_sample_grids.py"""

from pathlib import Path

from crustflow.samples.plateau import write_sample_grids

if __name__ == "__main__":
    for path in write_sample_grids(Path(__file__).resolve().parent):
        print(path)
