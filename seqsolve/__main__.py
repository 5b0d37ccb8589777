from seqsolve.cli import app

app()
