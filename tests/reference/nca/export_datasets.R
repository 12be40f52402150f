# Exports R's Theoph and Indometh data sets (package `datasets`) as the doses and levels CSVs
# that `cistern nca` reads, for tests/suite/nca.rs and nca_reference.py. Open data, used in the
# tests only.
#   Rscript tests/reference/nca/export_datasets.R tests/reference/nca
# Theoph: oral theophylline; Dose is mg/kg, so the amount is Dose * Wt (mg); Time in h, conc in
# mg/L. Indometh: intravenous bolus of indometacin; the documentation states no dose amount, so
# the doses file gives TEST_DOSE_MG, a dose chosen for the tests (CL and V then scale with it).
args <- commandArgs(trailingOnly = TRUE)
out <- if (length(args) > 0) args[1] else "."
TEST_DOSE_MG <- 25
# A comment line naming the source, then the table.
write_csv <- function(df, path, note) {
  writeLines(note, path)
  suppressWarnings(write.table(df, path, sep = ",", quote = FALSE, row.names = FALSE,
                               append = TRUE))
}
t <- as.data.frame(datasets::Theoph)
t$Subject <- as.integer(as.character(t$Subject))
t <- t[order(t$Subject, t$Time), ]
first <- t[!duplicated(t$Subject), ]
doses <- data.frame(subject = sprintf("T%02d", first$Subject), time_h = 0,
                    amount_mg = sprintf("%.10g", first$Dose * first$Wt), route = "oral")
levels <- data.frame(subject = sprintf("T%02d", t$Subject), time_h = sprintf("%.10g", t$Time),
                     conc_mg_l = sprintf("%.10g", t$conc))
note <- paste("# R", getRversion(), "datasets::Theoph, exported by export_datasets.R.")
write_csv(doses, file.path(out, "theoph_doses.csv"), note)
write_csv(levels, file.path(out, "theoph_levels.csv"), note)
i <- as.data.frame(datasets::Indometh)
i$Subject <- as.integer(as.character(i$Subject))
i <- i[order(i$Subject, i$time), ]
ids <- unique(i$Subject)
doses <- data.frame(subject = sprintf("I%d", ids), time_h = 0, amount_mg = TEST_DOSE_MG,
                    route = "bolus")
levels <- data.frame(subject = sprintf("I%d", i$Subject), time_h = sprintf("%.10g", i$time),
                     conc_mg_l = sprintf("%.10g", i$conc))
note <- paste("# R", getRversion(), "datasets::Indometh, exported by export_datasets.R;",
              "the amount is a test dose (the data set states none).")
write_csv(doses, file.path(out, "indometh_doses.csv"), note)
write_csv(levels, file.path(out, "indometh_levels.csv"), note)
