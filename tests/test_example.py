"""The bundled example compiles, and the structured operator matches its explicit matrix."""

import numpy as np
import jax.numpy as jnp


def test_example_operator_matches_csr(example_model):
    m = example_model
    P = m.csr()
    x = np.random.default_rng(1).normal(size=m.n_states)
    np.testing.assert_allclose(np.asarray(m.operator.mv(jnp.asarray(x))), P @ x, atol=1e-12)
    np.testing.assert_allclose(np.asarray(m.operator.transpose().mv(jnp.asarray(x))), P.T @ x, atol=1e-12)
    np.testing.assert_allclose(np.asarray(P.sum(axis=1)).ravel(), 1.0, atol=1e-12)
