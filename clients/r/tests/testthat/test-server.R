# Against a live server: WXSHOCK_TEST_SERVER (its URL) and WXSHOCK_TEST_COMMUNITIES (the demo's
# communities.geojson); the Python test suite sets both and compares the tables written to WXSHOCK_TEST_OUT.

live <- function() {
  url <- Sys.getenv("WXSHOCK_TEST_SERVER")
  skip_if(!nzchar(url), "no live server (set WXSHOCK_TEST_SERVER)")
  wxshock_server(url)
}
communities_file <- function() Sys.getenv("WXSHOCK_TEST_COMMUNITIES")

# Every value with 17 significant digits, so that a reader gets the very same doubles back.
write_exact <- function(frame, path) {
  out <- frame
  for (column in names(out)) {
    if (is.double(out[[column]])) {
      out[[column]] <- ifelse(is.na(out[[column]]), NA, sprintf("%.17g", out[[column]]))
    }
  }
  utils::write.csv(out, path, row.names = FALSE, na = "")
}

the_request <- list(dataset = "demo", baseline = c(1981, 1990), years = c(1991, 2020), season = 5:10,
                    indicators = c("prcp_total", "tmean", "spi"), lags = c(0, 1),
                    pairs = list(c("prcp_total", "tmean")))

test_that("a GeoJSON file gives one row per community and season-year, with provenance", {
  server <- live()
  shocks <- do.call(community_shocks, c(list(server, communities_file()), the_request))
  expect_equal(nrow(shocks), 62 * 30)
  expect_type(shocks$feature_id, "character")
  expect_type(shocks$year, "integer")
  expect_type(shocks$prcp_total_class, "integer")
  provenance <- shock_provenance(shocks)
  expect_equal(provenance$dataset, "demo")
  expect_match(provenance$fingerprint, "^sha256:")
  expect_equal(provenance$request$baseline, list(start = 1981L, end = 1990L))
  expect_s3_class(shock_warnings(shocks), "data.frame")
  out <- Sys.getenv("WXSHOCK_TEST_OUT")
  if (nzchar(out)) {
    write_exact(shocks, file.path(out, "from_geojson.csv"))
    writeLines(provenance$request_hash, file.path(out, "request_hash.txt"))
  }
})

test_that("an sf data frame gives the same table as its GeoJSON file", {
  skip_if_not_installed("sf")
  server <- live()
  villages <- sf::st_read(communities_file(), quiet = TRUE)[1:4, ]
  request <- the_request
  from_sf <- do.call(community_shocks, c(list(server, villages, id_column = "id"), request))
  expect_equal(unique(from_sf$feature_id), villages$id)
  from_file <- do.call(community_shocks, c(list(server, communities_file()), request))
  from_file <- from_file[from_file$feature_id %in% villages$id, ]
  rownames(from_file) <- NULL
  expect_equal(from_sf[, names(from_file)], from_file, tolerance = 1e-9, ignore_attr = TRUE)
  # a projected CRS goes along with the features
  projected <- sf::st_transform(villages, 32633)
  from_projected <- do.call(community_shocks, c(list(server, projected, id_column = "id"), request))
  expect_equal(shock_provenance(from_projected)$request$crs, "EPSG:32633")
  expect_equal(from_projected$prcp_total, from_sf$prcp_total, tolerance = 1e-6)
  skip_if_not_installed("tibble")
  as_tibble <- do.call(community_shocks, c(list(server, villages, id_column = "id", tibble = TRUE), request))
  expect_s3_class(as_tibble, "tbl_df")
  expect_equal(shock_provenance(as_tibble)$request_hash, shock_provenance(from_sf)$request_hash)
})

test_that("a refusal is a wxshock_problem condition with the server's fields", {
  server <- live()
  caught <- tryCatch(
    community_shocks(server, communities_file(), indicators = "rainfall"),
    wxshock_problem = function(condition) condition
  )
  expect_s3_class(caught, "wxshock_problem")
  expect_equal(caught$status, 422L)
  expect_match(caught$detail, "unknown indicator 'rainfall'")
  expect_match(caught$pointer %||% "", "^/indicators")
  expect_equal(caught$problem$status, 422L)
})

test_that("a batch job is followed with a progress bar and gives the on-demand table", {
  server <- live()
  villages <- communities_file()
  bar <- capture.output(
    job <- wait_for_job(do.call(submit_shocks, c(list(server, villages), the_request)), progress = TRUE),
    type = "message"
  )
  expect_equal(job$status$state, "succeeded")
  expect_equal(job$status$features_done, 62L)
  expect_true(any(grepl("100%", bar)))
  from_job <- job_result(job)
  on_demand <- do.call(community_shocks, c(list(server, villages, as_job = FALSE), the_request))
  expect_equal(from_job, on_demand, ignore_attr = TRUE)
  expect_equal(shock_provenance(from_job)$request_hash, shock_provenance(on_demand)$request_hash)
  expect_output(print(job), "succeeded, 62 of 62 features")
})

test_that("a Stata file from the server reads back with haven: labels, classes, strings, missing", {
  skip_if_not_installed("haven")
  server <- live()
  features <- wxshock:::geojson_features(communities_file())
  body <- wxshock:::request_body(features, do.call(wxshock:::request_fields, the_request))
  resp <- wxshock:::server_request(server, "POST", c("v1", "indicators"), body_json = body,
                                   query = list(format = "dta"))
  path <- tempfile(fileext = ".dta")
  writeBin(httr2::resp_body_raw(resp), path)
  stata <- haven::read_dta(path)
  shocks <- do.call(community_shocks, c(list(server, communities_file()), the_request))
  expect_equal(names(stata), names(shocks))
  expect_type(stata$feature_id, "character")
  expect_equal(stata$feature_id, shocks$feature_id, ignore_attr = TRUE)
  expect_equal(as.integer(stata$year), shocks$year)
  expect_equal(as.numeric(stata$prcp_total_z), shocks$prcp_total_z, tolerance = 1e-12)
  expect_equal(attr(stata$prcp_total, "label"), "Total precipitation of the season [mm]")
  labels <- attr(stata$tmean_class, "labels")
  expect_equal(names(labels)[labels == 2], "much warmer")
  expect_equal(names(labels)[labels == 0], "near normal")
  expect_equal(as.character(haven::as_factor(stata$tmean_class)),
               c("much cooler", "cooler", "near normal", "warmer", "much warmer")[shocks$tmean_class + 3])
  out <- Sys.getenv("WXSHOCK_TEST_OUT")
  if (nzchar(out)) {
    writeLines(vapply(names(stata), function(n) paste0(n, "\t", attr(stata[[n]], "label") %||% ""), ""),
               file.path(out, "haven_labels.tsv"))
  }
})
