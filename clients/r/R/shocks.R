# Season shocks of communities: the request in R's words, the answer as a data frame with its provenance.

# R shorthands into the request's JSON forms.
request_fields <- function(dataset = NULL, years = NULL, season = NULL, baseline = NULL,
                           indicators = NULL, lags = NULL, classes = NULL, pairs = NULL,
                           sequences = NULL, spells = NULL, ...) {
  span <- function(x, name) {
    if (is.list(x)) return(x)
    x <- as.integer(x)
    if (length(x) == 1L) return(list(start = x, end = x))
    if (length(x) == 2L) return(list(start = x[[1]], end = x[[2]]))
    stop(name, " must be one year or c(start, end), got ", deparse(x), call. = FALSE)
  }
  fields <- list(...)
  if (!is.null(dataset)) fields$dataset <- dataset
  if (!is.null(years)) fields$years <- span(years, "years")
  if (!is.null(baseline)) {
    fields$baseline <- if (is.numeric(baseline) && length(baseline) == 1L) {
      list(trailing = as.integer(baseline))
    } else {
      span(baseline, "baseline")
    }
  }
  if (!is.null(season)) {
    fields$season <- if (is.list(season) || identical(season, "year")) {
      season
    } else if (is.numeric(season)) {
      list(months = I(as.integer(season)))
    } else if (is.character(season) && length(season) == 2L) {
      list(start = season[[1]], end = season[[2]])
    } else {
      season
    }
  }
  if (!is.null(indicators)) fields$indicators <- if (is.list(indicators)) indicators else as.list(indicators)
  if (!is.null(lags)) fields$lags <- I(as.integer(lags))
  if (!is.null(classes)) fields$classes <- if (is.list(classes)) classes else list(edges = I(classes))
  if (!is.null(pairs)) fields$pairs <- lapply(pairs, function(p) I(as.character(p)))
  if (!is.null(sequences)) fields$sequences <- lapply(sequences, function(s) I(as.integer(s)))
  if (!is.null(spells)) fields$spells <- spells
  fields
}

# The request body as JSON text: the options by jsonlite, the features spliced in as they were read.
request_body <- function(features, fields) {
  if (!is.null(features$crs) && is.null(fields$crs)) fields$crs <- features$crs
  if (!is.null(features$id_property) && is.null(fields$id_property)) fields$id_property <- features$id_property
  options <- if (length(fields)) {
    as.character(jsonlite::toJSON(fields, auto_unbox = TRUE, digits = NA, null = "null"))
  } else {
    "{}"
  }
  head <- sub("\\}\\s*$", "", options)
  paste0(head, if (nchar(head) > 1) "," else "", "\"features\":", features$text, "}")
}

# A JSON result document as a data frame in its column order, with provenance and warnings as attributes.
result_frame <- function(text) {
  document <- jsonlite::fromJSON(text, simplifyVector = TRUE, simplifyDataFrame = TRUE)
  columns <- unlist(document$columns)
  rows <- document$rows
  if (length(rows) == 0L || NROW(rows) == 0L) {
    frame <- as.data.frame(stats::setNames(replicate(length(columns), logical(0), simplify = FALSE),
                                           columns), stringsAsFactors = FALSE)
  } else {
    frame <- as.data.frame(rows, stringsAsFactors = FALSE)[, columns, drop = FALSE]
  }
  if ("feature_id" %in% columns) frame$feature_id <- as.character(frame$feature_id)
  attr(frame, "provenance") <- jsonlite::fromJSON(text, simplifyVector = FALSE)$provenance
  warnings <- document$warnings
  attr(frame, "warnings") <- if (is.data.frame(warnings)) warnings else data.frame()
  frame
}

#' @export
community_shocks <- function(server, features, ..., id_column = NULL, as_job = NA,
                             progress = interactive(), tibble = FALSE) {
  stopifnot(inherits(server, "wxshock_server"))
  communities <- geojson_features(features, id_column)
  body <- request_body(communities, request_fields(...))
  if (isTRUE(as_job) || (is.na(as_job) && communities$count > server$on_demand_limit)) {
    job <- submit_body(server, body, communities$count)
    frame <- job_result(wait_for_job(job, progress = progress))
  } else {
    resp <- server_request(server, "POST", c("v1", "indicators"), body_json = body,
                           query = list(format = "json"), accept = "application/json")
    frame <- result_frame(httr2::resp_body_string(resp))
  }
  if (isTRUE(tibble)) frame <- as_shock_tibble(frame)
  frame
}

as_shock_tibble <- function(frame) {
  if (!requireNamespace("tibble", quietly = TRUE)) stop("tibble = TRUE needs the tibble package", call. = FALSE)
  out <- tibble::as_tibble(frame)
  attr(out, "provenance") <- attr(frame, "provenance")
  attr(out, "warnings") <- attr(frame, "warnings")
  out
}

#' @export
shock_provenance <- function(shocks) attr(shocks, "provenance")

#' @export
shock_warnings <- function(shocks) attr(shocks, "warnings")
