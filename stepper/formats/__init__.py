"""Every file Stepper reads or writes: model files, datasets, checkpoints, journals.

Readers validate what they read and raise :class:`stepper.errors.StepperError`
subclasses whose messages name the file and the key, line or column at fault.
"""
