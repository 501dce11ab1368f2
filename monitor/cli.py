def main(argv=None):
    raise SystemExit("chainvigil: not built yet")
