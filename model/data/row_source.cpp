#include "model/data/row_source.hpp"

#include <cstdio>
#include <stdexcept>

#include <xxhash.h>

namespace credence {

struct QueryRowBuilder::Hash {
    XXH3_state_t* state = XXH3_createState();
    ~Hash() { XXH3_freeState(state); }
};

QueryRowBuilder::QueryRowBuilder(std::vector<std::string> columns, std::function<void(uint64_t, uint64_t)> progress)
    : columns_(std::move(columns)), progress_(std::move(progress)), hash_(std::make_unique<Hash>()) {
    if (!hash_->state) throw std::bad_alloc();
    XXH3_64bits_reset(hash_->state);
    for (const auto& c : columns_) {
        XXH3_64bits_update(hash_->state, c.data(), c.size());
        XXH3_64bits_update(hash_->state, "\x1f", 1);
    }
    XXH3_64bits_update(hash_->state, "\x1e", 1);
}

QueryRowBuilder::~QueryRowBuilder() = default;

void QueryRowBuilder::begin_row() {
    text_.clear();
    spans_.clear();
    nulls_.clear();
}

void QueryRowBuilder::add_null() {
    spans_.emplace_back(text_.size(), 0);
    nulls_.push_back(1);
    XXH3_64bits_update(hash_->state, "\x00\x1f", 2);  // NULL: a byte no text value starts with
}

void QueryRowBuilder::add_text(std::string_view text) {
    spans_.emplace_back(text_.size(), text.size());
    text_.append(text);
    nulls_.push_back(0);
    XXH3_64bits_update(hash_->state, "\x01", 1);
    XXH3_64bits_update(hash_->state, text.data(), text.size());
    XXH3_64bits_update(hash_->state, "\x1f", 1);
}

void QueryRowBuilder::finish_row(SourceRow& row) {
    if (spans_.size() != columns_.size())
        throw std::logic_error("QueryRowBuilder: a row has " + std::to_string(spans_.size()) + " values for " +
                               std::to_string(columns_.size()) + " columns");
    XXH3_64bits_update(hash_->state, "\x1e", 1);
    ++rows_;
    if (progress_ && rows_ % 65536 == 0) progress_(rows_, 0);
    row.fields.clear();
    raw_.clear();
    for (size_t c = 0; c < spans_.size(); ++c) {
        const std::string_view value(text_.data() + spans_[c].first, spans_[c].second);
        row.fields.push_back(value);
        if (c) raw_ += "; ";
        raw_ += columns_[c];
        raw_ += '=';
        if (nulls_[c]) raw_ += "NULL";
        else raw_ += value;
    }
    row.is_null = nulls_;
    row.raw = raw_;
    row.position = rows_;
    row.end_position = rows_;
    row.problem = {};
    row.blank = false;
}

std::string QueryRowBuilder::fingerprint() const {
    char hex[17];
    std::snprintf(hex, sizeof hex, "%016llx", static_cast<unsigned long long>(XXH3_64bits_digest(hash_->state)));
    return hex;
}

}  // namespace credence
