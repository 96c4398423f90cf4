#include "server/audit/receipt.h"

#include <fcntl.h>
#include <openssl/evp.h>
#include <openssl/pem.h>
#include <openssl/x509.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstdio>
#include <cstring>
#include <ctime>
#include <fstream>
#include <sstream>
#include <vector>

#include "absl/strings/escaping.h"
#include "server/base/sha256.h"
#include "server/base/strings.h"

namespace tickmark::audit {
namespace {

using tickmark::v1::Receipt;

constexpr std::string_view kFirstLine = "tickmark receipt 1";

struct PkeyFree {
  void operator()(EVP_PKEY* p) const { EVP_PKEY_free(p); }
};
using Pkey = std::unique_ptr<EVP_PKEY, PkeyFree>;
struct BioFree {
  void operator()(BIO* b) const { BIO_free(b); }
};
using Bio = std::unique_ptr<BIO, BioFree>;
struct MdCtxFree {
  void operator()(EVP_MD_CTX* c) const { EVP_MD_CTX_free(c); }
};

Pkey ReadPublic(std::string_view pem) {
  Bio bio(BIO_new_mem_buf(pem.data(), static_cast<int>(pem.size())));
  if (!bio) return nullptr;
  return Pkey(PEM_read_bio_PUBKEY(bio.get(), nullptr, nullptr, nullptr));
}

absl::StatusOr<std::string> PublicPem(EVP_PKEY* key) {
  Bio bio(BIO_new(BIO_s_mem()));
  if (!bio || PEM_write_bio_PUBKEY(bio.get(), key) != 1) {
    return absl::InternalError("cannot write the receipt public key (OpenSSL)");
  }
  char* data = nullptr;
  long len = BIO_get_mem_data(bio.get(), &data);
  return std::string(data, static_cast<size_t>(len));
}

absl::StatusOr<std::string> DerSha256(EVP_PKEY* key) {
  unsigned char* der = nullptr;
  int len = i2d_PUBKEY(key, &der);
  if (len <= 0) return absl::InternalError("cannot encode the receipt public key (OpenSSL)");
  auto out = Sha256(std::string_view(reinterpret_cast<char*>(der), static_cast<size_t>(len)));
  OPENSSL_free(der);
  return out;
}

std::string ReadAll(const std::string& path, bool* ok) {
  std::ifstream in(path, std::ios::binary);
  *ok = static_cast<bool>(in);
  std::stringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

absl::Status WriteFileMode(const std::string& path, std::string_view data, mode_t mode) {
  int fd = ::open(path.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, mode);
  if (fd < 0)
    return absl::UnavailableError(Cat("cannot create ", path, ": ", std::strerror(errno)));
  size_t done = 0;
  while (done < data.size()) {
    ssize_t n = ::write(fd, data.data() + done, data.size() - done);
    if (n <= 0) {
      ::close(fd);
      return absl::UnavailableError(Cat("cannot write ", path));
    }
    done += static_cast<size_t>(n);
  }
  if (::fsync(fd) != 0 || ::close(fd) != 0)
    return absl::UnavailableError(Cat("cannot write ", path));
  return absl::OkStatus();
}

bool Unhex(std::string_view hex, std::string* out) {
  if (hex.size() % 2 != 0) return false;
  out->clear();
  auto nibble = [](char c) -> int {
    if (c >= '0' && c <= '9') return c - '0';
    if (c >= 'a' && c <= 'f') return c - 'a' + 10;
    return -1;
  };
  for (size_t i = 0; i < hex.size(); i += 2) {
    int hi = nibble(hex[i]), lo = nibble(hex[i + 1]);
    if (hi < 0 || lo < 0) return false;
    out->push_back(static_cast<char>(hi * 16 + lo));
  }
  return true;
}

}  // namespace

std::string Rfc3339Nanos(int64_t unix_ns) {
  int64_t secs = unix_ns / 1'000'000'000;
  int64_t frac = unix_ns % 1'000'000'000;
  if (frac < 0) {
    frac += 1'000'000'000;
    --secs;
  }
  time_t t = static_cast<time_t>(secs);
  struct tm tm {};
  gmtime_r(&t, &tm);
  char buf[64];
  std::snprintf(buf, sizeof buf, "%04d-%02d-%02dT%02d:%02d:%02d.%09lldZ", tm.tm_year + 1900,
                tm.tm_mon + 1, tm.tm_mday, tm.tm_hour, tm.tm_min, tm.tm_sec,
                static_cast<long long>(frac));
  return buf;
}

std::string ReceiptMessage(const Receipt& r) {
  return Cat(kFirstLine, "\n", "session: ", r.session_id(), "\n",
             "last_sequence: ", r.last_sequence(), "\n",
             "head_hash: ", absl::BytesToHexString(r.head_hash()), "\n",
             "chain_version: ", r.chain_version(), "\n", "signed_utc: ", r.signed_utc(), "\n",
             "public_key_sha256: ", absl::BytesToHexString(r.public_key_sha256()), "\n");
}

std::string ReceiptFileText(const Receipt& r) {
  return Cat(r.message(), "signature: ", absl::Base64Escape(r.signature()), "\n");
}

absl::StatusOr<Receipt> ParseReceiptFile(std::string_view text) {
  std::vector<std::string_view> lines;
  size_t at = 0;
  while (at < text.size()) {
    size_t nl = text.find('\n', at);
    if (nl == std::string_view::npos) nl = text.size();
    lines.push_back(text.substr(at, nl - at));
    at = nl + 1;
  }
  if (lines.size() < 8 || lines[0] != kFirstLine) {
    return absl::InvalidArgumentError(
        Cat("not a tickmark receipt (want 8 lines starting \"", kFirstLine, "\")"));
  }
  static const char* kKeys[] = {"session",    "last_sequence",     "head_hash", "chain_version",
                                "signed_utc", "public_key_sha256", "signature"};
  std::string_view values[7];
  for (int i = 0; i < 7; ++i) {
    std::string_view line = lines[static_cast<size_t>(i) + 1];
    std::string prefix = Cat(kKeys[i], ": ");
    if (line.substr(0, prefix.size()) != prefix) {
      return absl::InvalidArgumentError(
          Cat("receipt line ", i + 2, " should start with \"", prefix, "\""));
    }
    values[i] = line.substr(prefix.size());
  }
  Receipt r;
  r.set_session_id(std::string(values[0]));
  char* end = nullptr;
  std::string seq(values[1]);
  r.set_last_sequence(std::strtoull(seq.c_str(), &end, 10));
  if (seq.empty() || *end != '\0') return absl::InvalidArgumentError("receipt: bad last_sequence");
  std::string bytes;
  if (!Unhex(values[2], &bytes) || bytes.size() != 32) {
    return absl::InvalidArgumentError("receipt: head_hash is not 64 hex digits");
  }
  r.set_head_hash(bytes);
  std::string version(values[3]);
  r.set_chain_version(static_cast<uint32_t>(std::strtoul(version.c_str(), &end, 10)));
  if (version.empty() || *end != '\0')
    return absl::InvalidArgumentError("receipt: bad chain_version");
  r.set_signed_utc(std::string(values[4]));
  if (!Unhex(values[5], &bytes) || bytes.size() != 32) {
    return absl::InvalidArgumentError("receipt: public_key_sha256 is not 64 hex digits");
  }
  r.set_public_key_sha256(bytes);
  if (!absl::Base64Unescape(absl::string_view(values[6].data(), values[6].size()), &bytes) ||
      bytes.size() != 64) {
    return absl::InvalidArgumentError("receipt: signature is not 64 bytes of base64");
  }
  r.set_signature(bytes);
  r.set_message(ReceiptMessage(r));
  // The message must be the file's own first seven lines, byte for byte.
  size_t msg_len = 0;
  for (int i = 0; i < 7; ++i) msg_len += lines[static_cast<size_t>(i)].size() + 1;
  if (text.substr(0, msg_len) != r.message()) {
    return absl::InvalidArgumentError("receipt: the message lines are not in canonical form");
  }
  return r;
}

absl::StatusOr<std::string> PublicKeySha256(std::string_view public_pem) {
  Pkey key = ReadPublic(public_pem);
  if (!key || EVP_PKEY_get_id(key.get()) != EVP_PKEY_ED25519) {
    return absl::InvalidArgumentError("not an Ed25519 public key in PEM form");
  }
  return DerSha256(key.get());
}

absl::Status VerifySignature(std::string_view public_pem, std::string_view message,
                             std::string_view signature) {
  Pkey key = ReadPublic(public_pem);
  if (!key || EVP_PKEY_get_id(key.get()) != EVP_PKEY_ED25519) {
    return absl::InvalidArgumentError("not an Ed25519 public key in PEM form");
  }
  std::unique_ptr<EVP_MD_CTX, MdCtxFree> ctx(EVP_MD_CTX_new());
  // Ed25519 signs the message itself, with no digest (OpenSSL docs, EVP_PKEY-ED25519(7)).
  if (!ctx || EVP_DigestVerifyInit(ctx.get(), nullptr, nullptr, nullptr, key.get()) != 1) {
    return absl::InternalError("Ed25519 verify setup failed (OpenSSL)");
  }
  int ok = EVP_DigestVerify(ctx.get(), reinterpret_cast<const unsigned char*>(signature.data()),
                            signature.size(),
                            reinterpret_cast<const unsigned char*>(message.data()), message.size());
  if (ok != 1) return absl::FailedPreconditionError("signature does not verify");
  return absl::OkStatus();
}

absl::StatusOr<std::shared_ptr<const ReceiptKey>> ReceiptKey::LoadOrCreate(const std::string& dir) {
  const std::string path = Cat(dir.empty() ? "." : dir, "/", kReceiptKeyFile);
  const std::string pub_path = Cat(dir.empty() ? "." : dir, "/", kReceiptPublicKeyFile);
  std::shared_ptr<ReceiptKey> key(new ReceiptKey());
  struct stat st {};
  if (::stat(path.c_str(), &st) == 0) {
    if ((st.st_mode & 077) != 0) {
      return absl::FailedPreconditionError(
          Cat(path, " is readable by others; chmod 600 it: it signs the session receipts"));
    }
    bool ok = false;
    std::string pem = ReadAll(path, &ok);
    if (!ok) return absl::UnavailableError(Cat("cannot read ", path));
    Bio bio(BIO_new_mem_buf(pem.data(), static_cast<int>(pem.size())));
    EVP_PKEY* p = bio ? PEM_read_bio_PrivateKey(bio.get(), nullptr, nullptr, nullptr) : nullptr;
    if (p == nullptr || EVP_PKEY_get_id(p) != EVP_PKEY_ED25519) {
      EVP_PKEY_free(p);
      return absl::FailedPreconditionError(Cat(path, " is not an Ed25519 private key in PEM form"));
    }
    key->pkey_ = p;
  } else {
    // OpenSSL docs, EVP_PKEY_Q_keygen(3): a new key of the named type.
    EVP_PKEY* p = EVP_PKEY_Q_keygen(nullptr, nullptr, "ED25519");
    if (p == nullptr) return absl::InternalError("cannot make an Ed25519 key (OpenSSL)");
    key->pkey_ = p;
    Bio bio(BIO_new(BIO_s_mem()));
    if (!bio ||
        PEM_write_bio_PrivateKey(bio.get(), p, nullptr, nullptr, 0, nullptr, nullptr) != 1) {
      return absl::InternalError("cannot write the receipt key (OpenSSL)");
    }
    char* data = nullptr;
    long len = BIO_get_mem_data(bio.get(), &data);
    if (absl::Status s =
            WriteFileMode(path, std::string_view(data, static_cast<size_t>(len)), 0600);
        !s.ok()) {
      return s;
    }
  }
  auto pem = PublicPem(static_cast<EVP_PKEY*>(key->pkey_));
  if (!pem.ok()) return pem.status();
  key->public_pem_ = *pem;
  auto sha = DerSha256(static_cast<EVP_PKEY*>(key->pkey_));
  if (!sha.ok()) return sha.status();
  key->public_sha256_ = *sha;
  // The public half beside it, for verifiers (rewritten if missing or stale).
  bool have = false;
  std::string existing = ReadAll(pub_path, &have);
  if (!have || existing != key->public_pem_) {
    std::string tmp = pub_path + ".tmp";
    std::remove(tmp.c_str());
    if (absl::Status s = WriteFileMode(tmp, key->public_pem_, 0644); !s.ok()) return s;
    if (std::rename(tmp.c_str(), pub_path.c_str()) != 0) {
      return absl::UnavailableError(Cat("cannot write ", pub_path));
    }
  }
  return std::shared_ptr<const ReceiptKey>(std::move(key));
}

ReceiptKey::~ReceiptKey() { EVP_PKEY_free(static_cast<EVP_PKEY*>(pkey_)); }

absl::Status ReceiptKey::Sign(Receipt* receipt) const {
  receipt->set_public_key_sha256(public_sha256_);
  receipt->set_message(ReceiptMessage(*receipt));
  std::unique_ptr<EVP_MD_CTX, MdCtxFree> ctx(EVP_MD_CTX_new());
  unsigned char sig[64];
  size_t len = sizeof sig;
  const std::string& m = receipt->message();
  if (!ctx ||
      EVP_DigestSignInit(ctx.get(), nullptr, nullptr, nullptr, static_cast<EVP_PKEY*>(pkey_)) !=
          1 ||
      EVP_DigestSign(ctx.get(), sig, &len, reinterpret_cast<const unsigned char*>(m.data()),
                     m.size()) != 1 ||
      len != 64) {
    return absl::InternalError("Ed25519 signing failed (OpenSSL)");
  }
  receipt->set_signature(std::string(reinterpret_cast<char*>(sig), len));
  return absl::OkStatus();
}

}  // namespace tickmark::audit
