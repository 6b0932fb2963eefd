from claimkit.cli import run

run()
