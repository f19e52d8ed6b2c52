from requant.cli import console

console()
