# wxshock from R: season shocks for the demo communities, merged onto a person-year panel.
#
#   Rscript wxshock.R [SERVER] [COMMUNITIES.geojson] [SHOCKS_OUT.csv]
#
# Needs httr2 and jsonlite (Debian: r-cran-httr2, r-cran-jsonlite). SERVER defaults to $WXSHOCK_SERVER or
# http://127.0.0.1:8000; a bearer token is read from $WXSHOCK_TOKEN when the server needs one.
suppressPackageStartupMessages({
  library(httr2)
  library(jsonlite)
})

args <- commandArgs(trailingOnly = TRUE)
server <- if (length(args) >= 1) args[[1]] else Sys.getenv("WXSHOCK_SERVER", "http://127.0.0.1:8000")
communities_file <- if (length(args) >= 2) args[[2]] else "communities.geojson"
shocks_out <- if (length(args) >= 3) args[[3]] else ""

# The communities as sent: read without simplifying, so the GeoJSON goes back unchanged.
communities <- read_json(communities_file, simplifyVector = FALSE)

body <- list(
  dataset = "demo",
  features = communities,
  baseline = list(start = 1981, end = 1990),
  years = list(start = 1991, end = 2020),
  season = list(months = 5:10),                     # May to October
  indicators = list("prcp_total", "tmean", "spi"),
  lags = I(c(0, 1)),                                # I(): keep a JSON list even with one lag
  pairs = list(list("prcp_total", "tmean"))
)

# A server's problem document (RFC 9457) becomes the R error message, with the field it points at.
problem_message <- function(resp) {
  problem <- tryCatch(resp_body_json(resp), error = function(e) list(detail = resp_body_string(resp)))
  paste0(problem$detail, if (!is.null(problem$pointer)) paste0(" [at ", problem$pointer, "]") else "")
}

req <- request(server) |>
  req_url_path_append("v1", "indicators") |>
  req_url_query(format = "csv") |>
  req_body_json(body, auto_unbox = TRUE, digits = NA) |>
  req_error(body = problem_message) |>
  req_retry(max_tries = 3) |>
  req_timeout(300)
token <- Sys.getenv("WXSHOCK_TOKEN")
if (nzchar(token)) req <- req_auth_bearer_token(req, token)

resp <- req_perform(req)
shocks <- read.csv(text = resp_body_string(resp), colClasses = c(feature_id = "character"),
                   stringsAsFactors = FALSE)
cat(sprintf("%d rows (communities x season-years), %d columns; dataset %s, fingerprint %s\n",
            nrow(shocks), ncol(shocks), resp_header(resp, "X-Wxshock-Dataset"),
            resp_header(resp, "X-Wxshock-Fingerprint")))

# A toy person-year panel: 400 people, each living in one community, observed 1995-2015.
set.seed(7)
ids <- vapply(communities$features, function(f) as.character(f$id), "")
people <- data.frame(person = 1:400, community = sample(ids, 400, replace = TRUE))
panel <- merge(people, data.frame(year = 1995:2015))
panel <- panel[order(panel$person, panel$year), ]

merged <- merge(panel, shocks, by.x = c("community", "year"), by.y = c("feature_id", "year"), all.x = TRUE)
stopifnot(nrow(merged) == nrow(panel), !anyNA(merged$prcp_total_z))
cat(sprintf("panel %d person-years, merged %d, all with shocks\n", nrow(panel), nrow(merged)))
print(table(drier_and_warmer = merged$prcp_total_class < 0 & merged$tmean_class > 0))
print(head(merged[order(merged$person, merged$year),
                  c("person", "community", "year", "prcp_total_z", "tmean_z", "tmean_z_lag1", "spi")], 3),
      row.names = FALSE)

if (nzchar(shocks_out)) write.csv(shocks, shocks_out, row.names = FALSE)
