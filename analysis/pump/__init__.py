"""Electron-pump verification: how closely a single-electron pump delivers I = n·e·f.

- :mod:`analysis.pump.quantized`: n·e·f with e exact in the SI.
- :mod:`analysis.pump.plateau`: decay-cascade and thermal plateau models, fits, posterior, model
  comparison, working point and predicted deviation, two-gate maps.
- :mod:`analysis.pump.record`: on/off precision records: settling, drift-cancelling cycle
  differences, Allan deviation, Type A with autocorrelation, ammeter-chain budget with a JCGM 101
  check.
- :mod:`analysis.pump.settling`: the settling transient after each switch, measured from the
  stacked segments, the discard it calls for and the residual bias left.
- :mod:`analysis.pump.counting`: error probability from charge-detector counts.
- :mod:`analysis.pump.simulate`: seeded simulated data for demos and benchmarks.
"""
