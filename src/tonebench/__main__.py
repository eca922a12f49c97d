from tonebench.cli import app

app(prog_name="tonebench")
