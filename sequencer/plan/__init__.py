"""Planning (pure): table model, compiler, ordering, kinematics, timing; imports lang, optics, model and errors only, no I/O, no clock."""
