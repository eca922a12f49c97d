"""The files people write: plan and bench files (TOML), validated by pydantic into typed settings,
with one wording for every bad file; the keys a dialect file may declare per role; the VISA
resource forms a bench file may give.

May import only errors/units, sim/ (a bench file's [simulation] table is a sim Scenario) and
pydantic/pyvisa's resource-name parser; never instruments, the store or a run.
"""
