"""The example vision process's readers of its two input files, given them
as people save them: a spreadsheet's CSV (UTF-8 byte order mark, CRLF line
ends), a gzip-compressed JSON Lines file, and bad lines."""

import gzip
import importlib.util
import os
import tempfile
import unittest

import support

EXAMPLE = support.PYTHON_DIR / "examples" / "vision_feed.py"
DETECTIONS = support.PYTHON_DIR / "examples" / "detections.csv"


def load_example():
    spec = importlib.util.spec_from_file_location("vision_feed", EXAMPLE)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


class ExampleFilesTest(unittest.TestCase):
    @classmethod
    def setUpClass(cls):
        cls.vf = load_example()

    def setUp(self):
        self.dir = tempfile.TemporaryDirectory()
        self.addCleanup(self.dir.cleanup)

    def write(self, name, data: bytes) -> str:
        path = os.path.join(self.dir.name, name)
        with open(path, "wb") as f:
            f.write(data)
        return path

    def test_spreadsheet_csv(self):
        # A spreadsheet saving "CSV UTF-8" writes a byte order mark and CRLF
        # line ends (common practice); before, the first column's name
        # carried the mark and every row failed with KeyError 'capture_ns'.
        text = DETECTIONS.read_bytes()
        want = list(self.vf.read_detections(str(DETECTIONS), 7))
        path = self.write("excel.csv", b"\xef\xbb\xbf" + text.replace(b"\n", b"\r\n"))
        self.assertEqual(list(self.vf.read_detections(path, 7)), want)
        self.assertEqual(len(want), 20)

    def test_bad_csv_named(self):
        lines = DETECTIONS.read_bytes().decode().splitlines(keepends=True)
        first_row = next(i for i, line in enumerate(lines) if not line.startswith("#")) + 1  # the header's index
        bad = list(lines)
        fields = bad[first_row + 2].split(",")
        fields[2] = "0,12"  # a decimal comma: one field more, x_m "0" and y_m "12"
        fields[0] = "5.0e7"
        bad[first_row + 2] = ",".join(fields)
        path = self.write("bad.csv", "".join(bad).encode())
        with self.assertRaises(ValueError) as cm:
            self.vf.read_detections(path, 0)
        self.assertIn(f"{path}:{first_row + 3}: capture_ns: '5.0e7' is not an integer", str(cm.exception))
        path = self.write("noheader.csv", "".join(lines[first_row + 1:]).encode())
        with self.assertRaises(ValueError) as cm:
            self.vf.read_detections(path, 0)
        self.assertIn(f"{path}:1: the header lacks the column(s) capture_ns", str(cm.exception))

    def test_samples_gzip_bom_crlf(self):
        plain = support.SAMPLES.read_bytes()
        want = self.vf.read_samples(str(support.SAMPLES))
        self.assertGreater(len(want), 500)
        for name, data in (("s.jsonl.gz", gzip.compress(plain)),
                           ("bom.jsonl", b"\xef\xbb\xbf" + plain.replace(b"\n", b"\r\n"))):
            self.assertEqual(self.vf.read_samples(self.write(name, data)), want, name)

    def test_bad_samples_line_named(self):
        lines = support.SAMPLES.read_text().splitlines(keepends=True)
        lines[9] = '{"odometry": {"stamp_ns": "5", "colour": 3}}\n'
        path = self.write("bad.jsonl", "".join(lines).encode())
        with self.assertRaises(ValueError) as cm:
            self.vf.read_samples(path)
        self.assertIn(f"{path}:10: ", str(cm.exception))
        self.assertIn("colour", str(cm.exception))

    def test_damaged_gzip_named(self):
        # A .jsonl.gz cut short raised EOFError and a damaged one zlib.error,
        # which the example did not catch: a traceback naming no file (the
        # review of session 26). Both are named with the file and the line.
        packed = gzip.compress(support.SAMPLES.read_bytes())
        cut = self.write("cut.jsonl.gz", packed[: len(packed) // 2])
        damaged = bytearray(packed)
        for i in range(len(damaged) // 2, len(damaged) // 2 + 64):
            damaged[i] ^= 0x5A
        bad = self.write("damaged.jsonl.gz", bytes(damaged))
        for path, says in ((cut, "the compressed file is cut short or damaged here"), (bad, "")):
            # Damaged deflate data may decode into garbage a line's parse
            # refuses before the stream's check fails: named either way.
            with self.assertRaises(ValueError) as cm:
                self.vf.read_samples(path)
            self.assertRegex(str(cm.exception), "^" + path.replace(".", r"\.") + r":\d+: " + says)


if __name__ == "__main__":
    unittest.main()
