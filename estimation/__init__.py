"""Estimation: turn data into a model. Panels and market sizes are read and validated
(:mod:`.panel`), moves counted (:mod:`.counts`), tables estimated with their uncertainty
(:mod:`.estimate`, :mod:`.joins`, :mod:`.propensity`), reported on (:mod:`.diagnostics`), and
composed by :mod:`.fit`; :mod:`.simulate` draws synthetic panels from a spec's tables.

Sits beside :mod:`stateworth.solver` above :mod:`stateworth.rules`: it imports the model layer,
never the valuation, server or client layers.
"""
