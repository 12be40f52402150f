"""Write R's Theoph data (as exported to tests/reference/population/theoph/ by theoph.R) as
ADPPK datasets (CDISC ADaM population PK, CSV), for the tests of `--adppk`.

Plain csv module, no cistern code: the doses, levels and covariates files are read and every
subject's rows are written as ADPPK rows (EVID 1 for the dose, EVID 0 for each level),
sorted by subject and time. Two files hold the same study: `theoph_ug.csv` with AVALU ug/mL
(the values as recorded, which are mg/L), and `theoph_ng.csv` with AVALU ng/mL (each value
times 1000). Run from the repository root:

    python3 tests/reference/adppk/make_adppk.py
"""

import csv
import os

SRC = "tests/reference/population/theoph"
OUT = "tests/reference/adppk"
COLUMNS = ["STUDYID", "USUBJID", "SUBJID", "EVID", "MDV", "AFRLT", "NFRLT", "AMT", "ROUTE",
           "PARAMCD", "AVAL", "AVALU", "BLQFL", "WTBL", "ARM"]


def rows(name):
    with open(os.path.join(SRC, name), newline="") as f:
        return list(csv.DictReader(line for line in f if not line.startswith("#")))


def main():
    doses, levels, covariates = rows("doses.csv"), rows("levels.csv"), rows("covariates.csv")
    weight = {c["subject"]: c["weight_kg"] for c in covariates}
    for unit, scale in (("ug/mL", 1), ("ng/mL", 1000)):
        out = []
        for d in doses:
            assert d["route"] == "oral" and float(d["time_h"]) == 0
            out.append({"EVID": "1", "MDV": "1", "subject": d["subject"], "time": d["time_h"],
                        "AMT": d["amount_mg"], "ROUTE": "ORAL", "AVAL": "", "AVALU": "",
                        "BLQFL": ""})
        for l in levels:
            value = l["conc_mg_l"] if scale == 1 else repr(float(l["conc_mg_l"]) * scale)
            out.append({"EVID": "0", "MDV": "0", "subject": l["subject"], "time": l["time_h"],
                        "AMT": "", "ROUTE": "", "AVAL": value, "AVALU": unit, "BLQFL": "N"})
        out.sort(key=lambda r: (r["subject"], float(r["time"]), -int(r["EVID"])))
        name = "theoph_ug.csv" if scale == 1 else "theoph_ng.csv"
        with open(os.path.join(OUT, name), "w", newline="") as f:
            w = csv.writer(f, lineterminator="\n")
            w.writerow(COLUMNS)
            for r in out:
                s = r["subject"]
                w.writerow(["THEOPH", "THEOPH-" + s, s, r["EVID"], r["MDV"], r["time"], r["time"],
                            r["AMT"], r["ROUTE"], "THEO", r["AVAL"], r["AVALU"], r["BLQFL"],
                            weight[s], "SINGLE ORAL DOSE"])


if __name__ == "__main__":
    main()
