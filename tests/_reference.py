"""The r_eff the service uses, for tests that compare a snapshot with batch scores of the same draws."""
import numpy as np

from chainvigil.estimators.reff_stream import StreamingRelativeEfficiency


def streaming_r_eff(loglik) -> np.ndarray:
    """r_eff streamed from every post-warm-up draw of each chain as it arrives
    (chainvigil.estimators.reff_stream), for loglik shaped (chains, draws, n)."""
    loglik = np.asarray(loglik, dtype=float)
    est = StreamingRelativeEfficiency(loglik.shape[2])
    for c, chain in enumerate(loglik):
        est.update(f"chain{c}", chain)
    return est.result()
