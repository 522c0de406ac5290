from streamrate.cli import app

app(prog_name="streamrate")
