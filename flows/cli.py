def main(): print("ok")
