"""Write the two-tracer demo data vector and covariance from configs/multi_demo_truth.yaml.

Usage: python configs/make_multi_demo_data.py   (from the repository root; deterministic: fixed seed)
"""
import os
import warnings

from likelihood.model import build
from likelihood.spectra import save_spectra_covariance

HERE = os.path.dirname(os.path.abspath(__file__))


def main():
    warnings.simplefilter("ignore")
    lik = build(os.path.join(HERE, "multi_demo_truth.yaml"))
    sv = lik.data_full
    sv.meta.update({"survey": "Lanternfish Wide Survey, bright and faint populations (invented demo)",
                    "made_by": "configs/make_multi_demo_data.py from configs/multi_demo_truth.yaml"})
    sv.save(os.path.join(HERE, "multi_demo_data.txt"))
    save_spectra_covariance(os.path.join(HERE, "multi_demo_cov.txt"), lik.covariance_full, sv)
    print(f"wrote {os.path.join(HERE, 'multi_demo_data.txt')} ({sv.flat.size} points in "
          f"{len(sv.pairs)} spectra) and multi_demo_cov.txt")


if __name__ == "__main__":
    main()
