"""Write the awkward-input corpus (small invented files) into this folder.

    python tests/data/awkward/make_corpus.py

Every file is used by tests/test_awkward.py, which states the expected behaviour
for each. The files are committed; this script documents how each was made and
rewrites them byte for byte.
"""

from __future__ import annotations

import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def _rows(units: list[str], periods: list[int], value=lambda i, t: f"{i * 1.5 + t * 0.25:.2f}") -> list[str]:
    return [f"{u},{t},{value(i, t)}" for i, u in enumerate(units) for t in periods]


def corpus() -> dict[str, bytes]:
    """File name -> exact bytes."""
    files: dict[str, bytes] = {}
    ids = ["OR-0001", "OR-0002", "OR-0003"]

    base = "\n".join(["orchard_id,season,yield_t", *_rows(ids, [2020, 2021, 2022])]) + "\n"
    files["bom.csv"] = b"\xef\xbb\xbf" + base.encode("utf-8")
    files["crlf.csv"] = base.replace("\n", "\r\n").encode("utf-8")

    latin = ["orchard_id,season,note"]
    notes = ["grün", "süß", "café"]
    for i, u in enumerate(ids):
        for t in (2020, 2021):
            latin.append(f"{u},{t},{notes[i]}")
    files["latin1.csv"] = ("\n".join(latin) + "\n").encode("latin-1")

    files["header_only.csv"] = b"orchard_id,season,yield_t\n"
    files["one_row.csv"] = b"orchard_id,season,yield_t\nOR-0001,2020,3.5\n"
    files["one_unit.csv"] = (
        "\n".join(["orchard_id,season,yield_t", *_rows(["OR-0001"], [2018, 2019, 2020, 2021, 2022],
                                                       value=lambda i, t: str(t - 2015))]) + "\n"
    ).encode()
    files["one_period.csv"] = (
        "\n".join(["orchard_id,season,yield_t",
                   *[f"OR-000{i},2020,{i * 2}" for i in range(1, 6)]]) + "\n"
    ).encode()
    files["duplicate_columns.csv"] = (
        b"orchard_id,season,yield_t,yield_t\nOR-0001,2020,1,2\nOR-0002,2020,3,4\n"
    )
    files["time_words.csv"] = (
        b"orchard_id,season,yield_t\nOR-0001,2020,1\nOR-0001,2021,2\nOR-0002,unknown,3\nOR-0002,2021,4\n"
    )
    files["time_fractional.csv"] = (
        b"orchard_id,season,yield_t\nOR-0001,2020,1\nOR-0001,2020.5,2\nOR-0002,2021,3\n"
    )

    # inf twice, -inf once (three non-finite values), nan twice (missing)
    nf = ["orchard_id,season,yield_t,rain_mm"]
    vals = {
        ("OR-0001", 2020): "inf", ("OR-0001", 2021): "2.0", ("OR-0001", 2022): "nan",
        ("OR-0002", 2020): "-inf", ("OR-0002", 2021): "4.0", ("OR-0002", 2022): "5.0",
        ("OR-0003", 2020): "6.0", ("OR-0003", 2021): "inf", ("OR-0003", 2022): "nan",
    }
    for (u, t), v in vals.items():
        nf.append(f"{u},{t},{v},{100 + t - 2020}")
    files["nonfinite.csv"] = ("\n".join(nf) + "\n").encode()

    am = ["orchard_id,season,yield_t,empty_col"]
    am += [f"{u},{t},{i + t - 2019},"
           for i, u in enumerate(ids) for t in (2020, 2021)]
    files["all_missing_column.csv"] = ("\n".join(am) + "\n").encode()

    qn = ['orchard_id,season,remark,yield_t']
    for i, u in enumerate(ids):
        for t in (2020, 2021):
            qn.append(f'{u},{t},"line one\nline two, with a comma\nand ""quotes""",{i + t - 2019}')
    files["quoted_newlines.csv"] = ("\n".join(qn) + "\n").encode()

    files["semicolon.csv"] = (
        "\n".join(["orchard_id;season;yield_t",
                   *[f"{u};{t};{i}.{t - 2019}" for i, u in enumerate(ids) for t in (2020, 2021)]]) + "\n"
    ).encode()

    lz = ["orchard_id,season,yield_t"]
    for i, u in enumerate(["007", "7", "07", "0070"]):
        for t in (2020, 2021):
            lz.append(f"{u},{t},{i * 10 + t - 2019}")
    files["leading_zeros.csv"] = ("\n".join(lz) + "\n").encode()

    # 2**53 = 9007199254740992; 2**53 + 1 is not representable as a float64
    big = ["orchard_id,season,yield_t"]
    for u in ("9007199254740992", "9007199254740993"):
        for t in (2020, 2021):
            big.append(f"{u},{t},{int(u[-1]) + t - 2019}")
    big.append("9007199254740993,2021,9")  # one duplicate key, on the id a float would lose
    files["big_ids.csv"] = ("\n".join(big) + "\n").encode()

    n_cols = 2000
    header = ["orchard_id", "season", *[f"v{j:04d}" for j in range(n_cols)]]
    wide = [",".join(header)]
    for i, u in enumerate(ids):
        for t in (2020, 2021, 2022, 2023):
            wide.append(",".join([u, str(t), *[str((i * 7 + t * 3 + j) % 11) for j in range(n_cols)]]))
    files["wide.csv"] = ("\n".join(wide) + "\n").encode()

    long_id = "OR-" + "9" * 5_000
    long_note = "x" * 20_000
    lt = ["orchard_id,season,note,yield_t"]
    for i, u in enumerate(["OR-0001", long_id]):
        for t in (2020, 2021):
            lt.append(f"{u},{t},{long_note if i else 'short'},{i + t - 2019}")
    lt.append(f"{long_id},2021,dup,5")  # a duplicate key on the long id: it appears in examples
    files["long_text.csv"] = ("\n".join(lt) + "\n").encode()

    hostile_cols = [
        "<script>alert('x')</script>",
        "\x1b[2J\x1b[31mred\x1b[0m",
        "bell\x07and\x08back",
    ]
    hn = [",".join(["orchard_id", "season", *[f'"{c}"' for c in hostile_cols]])]
    for i, u in enumerate(ids):
        for t in (2020, 2021):
            hn.append(f"{u},{t},{i + t - 2019},{i},{t - 2019}")
    # a unit id with a control sequence too: it shows up in the duplicate-keys examples
    hn.append("\x1b]0;owned\x07OR-9,2020,1,1,1")
    hn.append("\x1b]0;owned\x07OR-9,2020,1,1,1")
    files["hostile_names.csv"] = ("\n".join(hn) + "\n").encode()
    files.update(_second_round())
    return files


def _keys_007(header: str, extra: int = 0) -> bytes:
    """``header`` then units 007 and 7 (two units as text, one as numbers) in 2020-2021,
    with ``extra`` filler cells before the two keys and the value."""
    lines = [header]
    for i, u in enumerate(["007", "7"]):
        for t in (2020, 2021):
            lines.append(",".join(["1"] * extra + [u, str(t), str(i * 10 + t - 2019)]))
    return ("\n".join(lines) + "\n").encode("utf-8")


def _second_round() -> dict[str, bytes]:
    """Files of the second robustness round (issue 19)."""
    files: dict[str, bytes] = {}
    # a header cell with a trailing space, and one with doubled quotes
    files["header_trailing_space.csv"] = _keys_007("orchard_id ,season,yield_t")
    files["header_quotes.csv"] = _keys_007('"orchard ""id""",season,yield_t')
    # a header longer than 64 KiB with the keys after byte 65,536
    filler = [f"filler_column_{j:05d}" for j in range(3500)]  # 20 bytes each: 70,000 bytes
    files["header_long.csv"] = _keys_007(",".join([*filler, "orchard_id", "season", "yield_t"]), extra=3500)
    # a two-byte character (é, C3 A9) whose bytes straddle byte 65,536, then the keys
    head = "x" * 65_535 + "é"  # 'é' takes bytes 65,536 and 65,537 (1-based): split by a 64 KiB cut
    straddle = _keys_007(f"{head},orchard_id,season,yield_t", extra=1)
    assert straddle[65_535:65_537] == b"\xc3\xa9"
    files["header_straddle.csv"] = straddle
    # a real duplicate name past 64 KiB
    dup = [f"filler_column_{j:05d}" for j in range(3500)]
    files["header_duplicate_far.csv"] = _keys_007(
        ",".join([*dup, "orchard_id", "season", "filler_column_03499"]), extra=3500
    )
    # the same id written three ways (composed é, e + combining accent, a zero-width space),
    # and two plainly different ids
    tw = ["orchard_id,season,yield_t"]
    for i, u in enumerate(["OR-caf\u00e9", "OR-cafe\u0301", "OR-\u200bcafé", "OR-0001", "OR-0002"]):
        for t in (2020, 2021):
            tw.append(f"{u},{t},{i + t - 2019}")
    files["unicode_twins.csv"] = ("\n".join(tw) + "\n").encode("utf-8")
    # bidirectional overrides, zero-width characters, C1 controls and a hyperlink escape in
    # column names, unit ids and category levels
    names = ["rain\u202emm", "zero\u200bwidth", "c1\u009b31m", "link\x1b]8;;http://example.invalid\x1b\\x"]
    hb = [",".join(["orchard_id", "season", *names])]
    for i, u in enumerate(["OR-1", "OR-\u202e2", "OR-\u200d3", "OR-\u20664"]):
        for t in (2020, 2021, 2022):
            level = "LM" if (i + t) % 2 else "S\u202eD"
            hb.append(",".join([u, str(t), f"{i * 3 + t - 2019}.5", level, str(i + t % 3), level]))
    files["hostile_bidi.csv"] = ("\n".join(hb) + "\n").encode("utf-8")

    # rules files: a 17-byte recursive alias, a billion laughs, a 5,000-digit number,
    # Latin-1 bytes, and legitimate aliases
    files["rules_alias_loop.yaml"] = b"profile: &x [*x]\n"
    laughs = ['a: &a ["lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol"]']
    for j in range(1, 10):
        prev, cur = chr(ord("a") + j - 1), chr(ord("a") + j)
        laughs.append(f"{cur}: &{cur} [" + ", ".join([f"*{prev}"] * 9) + "]")
    files["rules_laughs.yaml"] = ("\n".join(laughs) + "\n").encode()
    files["rules_long_number.yaml"] = ("profile:\n  few_switchers: " + "9" * 5000 + "\n").encode()
    files["rules_latin1.yaml"] = "severities:\n  gaps: note\n# caf\u00e9 au lait\n".encode("latin-1")
    files["rules_aliases.yaml"] = (
        b"thresholds:\n  profile:\n    high_missing_share: &share 0.30\n"
        b"  compare:\n    missing_jump: *share\n"
    )
    return files


def main(folder: Path = HERE) -> None:
    for name, data in corpus().items():
        (folder / name).write_bytes(data)


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else HERE)
