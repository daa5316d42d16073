#include "model/assess/model_delta.hpp"

#include <algorithm>
#include <cmath>
#include <unordered_map>

#include <fmt/format.h>

namespace credence {

namespace {

nlohmann::json parse_object(const std::string& text) {
    auto j = nlohmann::json::parse(text, nullptr, false);
    return j.is_discarded() || !j.is_object() ? nlohmann::json::object() : j;
}

template <class T>
T at_or(const nlohmann::json& j, std::initializer_list<const char*> path, T fallback) {
    const nlohmann::json* at = &j;
    for (const char* key : path) {
        if (!at->is_object() || !at->contains(key)) return fallback;
        at = &(*at)[key];
    }
    try {
        return at->get<T>();
    } catch (const nlohmann::json::exception&) {
        return fallback;
    }
}

IdChanges id_changes(const std::vector<std::string>& before, const std::vector<std::string>& after, bool list) {
    IdChanges c;
    c.before = before.size();
    c.after = after.size();
    const IdMap b = IdMap::from_names(before), a = IdMap::from_names(after);
    for (const auto& id : after)
        if (!b.find(id)) {
            ++c.added;
            if (list) c.added_ids.push_back(id);
        }
    for (const auto& id : before)
        if (!a.find(id)) {
            ++c.dropped;
            if (list) c.dropped_ids.push_back(id);
        }
    c.kept = c.after - c.added;
    return c;
}

struct Moments {
    std::vector<double> mean, sd;  // [items]
};

// Each product's a_s(i) (see the header) averaged over samples, and its sd.
Moments product_moments(const Posterior& p) {
    const size_t U = p.num_users, I = p.num_items, K = p.rank, S = p.num_samples;
    std::vector<double> sum(I, 0.0), sum_sq(I, 0.0);
    std::vector<double> mean_user(K);
    for (size_t s = 0; s < S; ++s) {
        std::fill(mean_user.begin(), mean_user.end(), 0.0);
        double mean_bias = 0.0;
        for (size_t u = 0; u < U; ++u) {
            const auto f = p.user_factor(uint32_t(s), uint32_t(u));
            for (size_t k = 0; k < K; ++k) mean_user[k] += f[k];
            mean_bias += p.user_bias_of(uint32_t(s), uint32_t(u));
        }
        for (size_t k = 0; k < K; ++k) mean_user[k] /= double(std::max<size_t>(U, 1));
        mean_bias /= double(std::max<size_t>(U, 1));
        for (size_t i = 0; i < I; ++i) {
            const auto v = p.item_factor(uint32_t(s), uint32_t(i));
            double a = double(p.global_mean) + mean_bias + p.item_bias_of(uint32_t(s), uint32_t(i));
            for (size_t k = 0; k < K; ++k) a += mean_user[k] * v[k];
            sum[i] += a;
            sum_sq[i] += a * a;
        }
    }
    Moments m;
    m.mean.resize(I);
    m.sd.resize(I);
    for (size_t i = 0; i < I; ++i) {
        m.mean[i] = sum[i] / double(S);
        m.sd[i] = std::sqrt(std::max(0.0, sum_sq[i] / double(S) - m.mean[i] * m.mean[i]));
    }
    return m;
}

std::vector<ProductShift> largest(std::vector<ProductShift> shifts, uint32_t top, bool by_mean) {
    auto size = [by_mean](const ProductShift& x) {
        return by_mean ? std::abs(x.mean_after - x.mean_before) : std::abs(x.sd_after - x.sd_before);
    };
    const size_t n = std::min<size_t>(top, shifts.size());
    std::partial_sort(shifts.begin(), shifts.begin() + n, shifts.end(), [&](const ProductShift& a, const ProductShift& b) {
        return size(a) != size(b) ? size(a) > size(b) : a.product < b.product;
    });
    shifts.resize(n);
    return shifts;
}

nlohmann::json number(double v) { return std::isfinite(v) ? nlohmann::json(v) : nlohmann::json(nullptr); }

nlohmann::json to_json(const FitFacts& f) {
    return {{"created_at", f.created_at},       {"credence_version", f.credence_version},
            {"data_fingerprint", f.data_fingerprint}, {"verdict", f.verdict},
            {"start", f.start},                 {"training_ratings", f.training_ratings},
            {"sweeps_per_chain", f.sweeps_per_chain}, {"burn_in", f.burn_in},
            {"sampling_s", number(f.sampling_s)}};
}

nlohmann::json to_json(const IdChanges& c, bool with_ids) {
    nlohmann::json j = {{"before", c.before}, {"after", c.after}, {"kept", c.kept}, {"added", c.added},
                        {"dropped", c.dropped}};
    if (with_ids) {
        j["added_ids"] = c.added_ids;
        j["dropped_ids"] = c.dropped_ids;
    }
    return j;
}

nlohmann::json to_json(const std::vector<ProductShift>& shifts) {
    nlohmann::json out = nlohmann::json::array();
    for (const auto& x : shifts)
        out.push_back({{"product", x.product},
                       {"mean_before", x.mean_before},
                       {"mean_after", x.mean_after},
                       {"sd_before", x.sd_before},
                       {"sd_after", x.sd_after}});
    return out;
}

std::string id_list(const std::vector<std::string>& ids, size_t shown) {
    std::string out;
    for (size_t k = 0; k < ids.size() && k < shown; ++k) out += (k ? ", " : "") + ids[k];
    if (ids.size() > shown) out += fmt::format(" and {} more", ids.size() - shown);
    return out;
}

}  // namespace

FitFacts fit_facts(const Posterior& p) {
    const auto meta = parse_object(p.fit_metadata_json), diag = parse_object(p.diagnostics_json);
    FitFacts f;
    f.created_at = at_or<std::string>(meta, {"created_at"}, "");
    f.credence_version = at_or<std::string>(meta, {"credence_version"}, "");
    f.data_fingerprint = at_or<std::string>(meta, {"data_fingerprint"}, "");
    f.verdict = at_or<std::string>(diag, {"verdict"}, "unknown");
    f.start = at_or<std::string>(meta, {"start", "kind"}, "cold");
    f.training_ratings = at_or<uint64_t>(meta, {"data", "ratings"}, p.rated_items.size());
    f.sweeps_per_chain = at_or<uint32_t>(meta, {"sweeps_per_chain"}, 0);
    f.burn_in = at_or<uint32_t>(meta, {"run_length", "burn_in"}, 0);
    f.sampling_s = at_or<double>(meta, {"timings", "sampling_s"}, NAN);
    return f;
}

ModelDelta model_delta(const Posterior& before, const Posterior& after, const DeltaOptions& options,
                       const RatingSet* validation) {
    ModelDelta d;
    d.before_fit = fit_facts(before);
    d.after_fit = fit_facts(after);
    d.customers = id_changes(before.user_ids, after.user_ids, options.list_customer_ids);
    d.products = id_changes(before.item_ids, after.item_ids, true);
    const Moments mb = product_moments(before), ma = product_moments(after);
    const IdMap before_items = IdMap::from_names(before.item_ids);
    std::vector<ProductShift> shifts;
    for (uint32_t i = 0; i < after.num_items; ++i) {
        const auto b = before_items.find(after.item_ids[i]);
        if (!b) continue;
        shifts.push_back({after.item_ids[i], mb.mean[*b], ma.mean[i], mb.sd[*b], ma.sd[i]});
    }
    d.mean_moves = largest(shifts, options.top, true);
    d.sd_moves = largest(std::move(shifts), options.top, false);
    if (validation) d.accuracy = paired_accuracy(before, after, *validation);
    return d;
}

nlohmann::json to_json(const ModelDelta& d) {
    return {{"before", {{"fit", to_json(d.before_fit)}}},
            {"after", {{"fit", to_json(d.after_fit)}}},
            {"customers", to_json(d.customers, !d.customers.added_ids.empty() || !d.customers.dropped_ids.empty())},
            {"products", to_json(d.products, true)},
            {"product_measure",
             "per kept sample, the mean prediction over the model's customers; mean and sd over samples"},
            {"mean_moves", to_json(d.mean_moves)},
            {"sd_moves", to_json(d.sd_moves)},
            {"accuracy", d.accuracy ? to_json(*d.accuracy) : nlohmann::json(nullptr)}};
}

std::string format_text(const ModelDelta& d) {
    std::string o;
    auto fit_line = [&](const char* which, const FitFacts& f) {
        o += fmt::format("{:<7} {} (credence {}), {} start, {} training ratings, {} after {} sweeps per chain "
                         "(burn-in {}, {:.0f} s sampling), data {}\n",
                         which, f.created_at.empty() ? "-" : f.created_at, f.credence_version.empty() ? "-" : f.credence_version,
                         f.start, f.training_ratings, f.verdict, f.sweeps_per_chain, f.burn_in, f.sampling_s,
                         f.data_fingerprint.empty() ? "-" : f.data_fingerprint);
    };
    fit_line("before:", d.before_fit);
    fit_line("after:", d.after_fit);
    o += fmt::format("customers: {} -> {} ({} kept, {} new, {} dropped)\n", d.customers.before, d.customers.after,
                     d.customers.kept, d.customers.added, d.customers.dropped);
    if (!d.customers.added_ids.empty()) o += "  new: " + id_list(d.customers.added_ids, 20) + "\n";
    if (!d.customers.dropped_ids.empty()) o += "  dropped: " + id_list(d.customers.dropped_ids, 20) + "\n";
    o += fmt::format("products: {} -> {} ({} kept, {} new, {} dropped)\n", d.products.before, d.products.after,
                     d.products.kept, d.products.added, d.products.dropped);
    if (!d.products.added_ids.empty()) o += "  new: " + id_list(d.products.added_ids, 20) + "\n";
    if (!d.products.dropped_ids.empty()) o += "  dropped: " + id_list(d.products.dropped_ids, 20) + "\n";
    auto table = [&](const char* title, const std::vector<ProductShift>& rows) {
        o += std::string(title) + "\n";
        o += fmt::format("  {:<24} {:>15} {:>15}\n", "product", "mean", "uncertainty (sd)");
        for (const auto& x : rows)
            o += fmt::format("  {:<24} {:>6.3f} -> {:<6.3f} {:>6.3f} -> {:<6.3f}\n", x.product, x.mean_before,
                             x.mean_after, x.sd_before, x.sd_after);
    };
    table("products whose predicted mean moved most (mean over customers, rating units):", d.mean_moves);
    table("products whose uncertainty moved most:", d.sd_moves);
    if (d.accuracy) {
        const PairedAccuracy& a = *d.accuracy;
        o += fmt::format("held-out accuracy on {} of {} ratings (known to both, trained on by neither; {} with an "
                         "unknown id, {} training pairs skipped):\n",
                         a.compared, a.ratings, a.unknown, a.trained);
        o += fmt::format("  RMSE {:.4f} -> {:.4f}; mean log predictive density {:.4f} -> {:.4f}\n", a.before_rmse,
                         a.after_rmse, a.before_log_density, a.after_log_density);
        o += fmt::format("  paired change: log density {:+.4f} (SE {:.4f}), squared error {:+.4f} (SE {:.4f})\n",
                         a.log_density_difference, a.log_density_difference_se, a.squared_error_difference,
                         a.squared_error_difference_se);
    }
    return o;
}

}  // namespace credence
