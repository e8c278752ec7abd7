"""Stage 3, local fits: normal-equation statistics and the models fitted from them
(sparse, affine, their selection rules and uncertainty), one regime at a time."""
