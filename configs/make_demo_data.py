"""Write the demo data vector and covariance from configs/demo_truth.yaml.

Usage: python configs/make_demo_data.py   (from the repository root; deterministic: fixed seed)
"""
import os
import warnings

from likelihood.data import save_covariance
from likelihood.model import build

HERE = os.path.dirname(os.path.abspath(__file__))


def main():
    warnings.simplefilter("ignore")
    lik = build(os.path.join(HERE, "demo_truth.yaml"))
    dv = lik.data_full
    dv.meta.update({"survey": "Lanternfish Wide Survey (invented demo)",
                    "made_by": "configs/make_demo_data.py from configs/demo_truth.yaml"})
    dv.save(os.path.join(HERE, "demo_data.txt"))
    save_covariance(os.path.join(HERE, "demo_cov.txt"), lik.covariance_full, dv.ells, dv.n_bins)
    print(f"wrote {os.path.join(HERE, 'demo_data.txt')} ({dv.flat.size} points) and demo_cov.txt")


if __name__ == "__main__":
    main()
