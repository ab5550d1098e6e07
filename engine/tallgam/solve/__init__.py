"""The dense stage (p × p, no rows) and the iteration driver.

:mod:`.constraints` turns a pass's state into the working problem in free coordinates;
:mod:`.smoothing` chooses the smoothing parameters and solves it; :mod:`.covariance` holds
the coefficients' covariance; :mod:`.shapes` imposes shape constraints; :mod:`.pirls` drives
profile → passes → dense stage until the fit converges."""
