"""Plant models and what runs beside them: LTI, transfer function, ODE and FMU steppers,
dead time, model summaries, references and built-in controllers.

Public names are read from plantrig.sim."""
