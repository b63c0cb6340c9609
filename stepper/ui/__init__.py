"""The terminal app (``stepper open``), built with Textual and plotext.

Modules, one job each:

- :mod:`stepper.ui.keys`: every key, its action and its help text (one table).
- :mod:`stepper.ui.snapshot`: a read-only picture of the session for one frame.
- :mod:`stepper.ui.weights`: the weight table, a line-API widget for 10,000+ rows.
- :mod:`stepper.ui.costplot`: the cost plot drawn by plotext.
- :mod:`stepper.ui.panels`: status line, rate preview panel and the job bar.
- :mod:`stepper.ui.dialogs`: the modal screens (typed values, choices, quit, help).
- :mod:`stepper.ui.insight`: the figures of the "why" panels, computed by the core from a snapshot.
- :mod:`stepper.ui.slicepanel`, :mod:`stepper.ui.factorpanel`, :mod:`stepper.ui.healthpanel`:
  the "why" panels: the cost along a weight, its slope's factors, layer health.
- :mod:`stepper.ui.app`: the app, which lays out the widgets and wires the keys to the handlers.
- :mod:`stepper.ui.base`: the app's shared state and helpers (apply an operation, redraw, ask).
- Key handlers, one concern each: :mod:`stepper.ui.descent`, :mod:`stepper.ui.slopes`,
  :mod:`stepper.ui.edits`, :mod:`stepper.ui.why`, :mod:`stepper.ui.files`, and
  :mod:`stepper.ui.jobs` (long work in thread workers).

Widgets render and post messages; only the app calls the session, and only
the session holds model state.
"""
