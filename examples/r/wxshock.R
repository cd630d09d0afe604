# wxshock from R: season shocks for the demo communities, merged onto a person-year panel.
#
#   Rscript wxshock.R [SERVER] [COMMUNITIES.geojson] [SHOCKS_OUT.csv]
#
# Needs the wxshock R package (R CMD INSTALL clients/r; it uses Debian's r-cran-httr2 and r-cran-jsonlite,
# and r-cran-sf for sf data frames). SERVER defaults to $WXSHOCK_SERVER or http://127.0.0.1:8000; a
# bearer token is read from $WXSHOCK_TOKEN when the server needs one.
suppressPackageStartupMessages(library(wxshock))

args <- commandArgs(trailingOnly = TRUE)
server <- wxshock_server(if (length(args) >= 1) args[[1]] else Sys.getenv("WXSHOCK_SERVER", "http://127.0.0.1:8000"))
communities <- if (length(args) >= 2) args[[2]] else "communities.geojson"
shocks_out <- if (length(args) >= 3) args[[3]] else ""

shocks <- community_shocks(server, communities, dataset = "demo", baseline = c(1981, 1990),
                           years = c(1991, 2020), season = 5:10,
                           indicators = c("prcp_total", "tmean", "spi"), lags = c(0, 1),
                           pairs = list(c("prcp_total", "tmean")))
provenance <- shock_provenance(shocks)
cat(sprintf("%d rows (communities x season-years), %d columns; dataset %s, fingerprint %s\n",
            nrow(shocks), ncol(shocks), provenance$dataset, provenance$fingerprint))

# A toy person-year panel: 400 people, each living in one community, observed 1995-2015.
set.seed(7)
people <- data.frame(person = 1:400, community = sample(unique(shocks$feature_id), 400, replace = TRUE))
panel <- merge(people, data.frame(year = 1995:2015))
merged <- merge(panel, shocks, by.x = c("community", "year"), by.y = c("feature_id", "year"), all.x = TRUE)
stopifnot(nrow(merged) == nrow(panel), !anyNA(merged$prcp_total_z))
cat(sprintf("panel %d person-years, merged %d, all with shocks\n", nrow(panel), nrow(merged)))
print(table(drier_and_warmer = merged$prcp_total_class < 0 & merged$tmean_class > 0))
print(head(merged[order(merged$person, merged$year),
                  c("person", "community", "year", "prcp_total_z", "tmean_z", "tmean_z_lag1", "spi")], 3),
      row.names = FALSE)

if (nzchar(shocks_out)) write.csv(shocks, shocks_out, row.names = FALSE)
