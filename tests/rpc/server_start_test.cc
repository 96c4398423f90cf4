// TickmarkServer::Start refuses what it cannot serve safely, with a message
// naming the cause: a half or mismatched TLS pair, unreadable or non-PEM
// files, and plaintext on a name that merely looks like loopback (issue 9.10).
// Certificates are made here with OpenSSL, hermetically, in a temp folder.
#include <openssl/bio.h>
#include <openssl/evp.h>
#include <openssl/pem.h>
#include <openssl/x509.h>

#include <fstream>
#include <memory>
#include <string>

#include "server/rpc/server.h"
#include "gmock/gmock.h"
#include "tests/rpc/test_server.h"

namespace tickmark::testing {
namespace {

using ::testing::HasSubstr;

// A fresh P-256 key and a self-signed certificate for it, as PEM files.
struct PemPair {
  std::string cert_file;
  std::string key_file;
};

std::string ToPem(int (*write)(BIO*, void*), void* object) {
  std::unique_ptr<BIO, decltype(&BIO_free)> bio(BIO_new(BIO_s_mem()), &BIO_free);
  write(bio.get(), object);
  char* data = nullptr;
  const long n = BIO_get_mem_data(bio.get(), &data);
  return std::string(data, static_cast<size_t>(n));
}

void WriteFile(const std::string& path, const std::string& bytes) {
  std::ofstream(path, std::ios::binary) << bytes;
}

PemPair MakePair(const std::string& dir, const std::string& name) {
  EVP_PKEY* key = EVP_EC_gen("P-256");
  X509* cert = X509_new();
  X509_set_version(cert, 2);
  ASN1_INTEGER_set(X509_get_serialNumber(cert), 1);
  X509_gmtime_adj(X509_getm_notBefore(cert), 0);
  X509_gmtime_adj(X509_getm_notAfter(cert), 3600);
  X509_set_pubkey(cert, key);
  X509_NAME* subject = X509_get_subject_name(cert);
  X509_NAME_add_entry_by_txt(subject, "CN", MBSTRING_ASC,
                             reinterpret_cast<const unsigned char*>("localhost"), -1, -1, 0);
  X509_set_issuer_name(cert, subject);
  X509_sign(cert, key, EVP_sha256());
  PemPair p{dir + "/" + name + ".crt", dir + "/" + name + ".key"};
  WriteFile(p.cert_file, ToPem([](BIO* b, void* x) { return PEM_write_bio_X509(b, static_cast<X509*>(x)); },
                               cert));
  WriteFile(p.key_file, ToPem([](BIO* b, void* k) {
                                return PEM_write_bio_PrivateKey(b, static_cast<EVP_PKEY*>(k), nullptr,
                                                                nullptr, 0, nullptr, nullptr);
                              },
                              key));
  X509_free(cert);
  EVP_PKEY_free(key);
  return p;
}

class ServerStartTlsTest : public ::testing::Test {
 protected:
  absl::Status Start(const std::string& cert, const std::string& key,
                     const std::string& listen = "127.0.0.1:0") {
    rpc::ServerOptions o;
    o.listen = listen;
    o.data_dir = dir_.path() + "/data";
    o.tls_cert_file = cert;
    o.tls_key_file = key;
    auto s = rpc::TickmarkServer::Start(o);
    return s.status();
  }
  TempDir dir_;
  PemPair a_ = MakePair(dir_.path(), "a");
  PemPair b_ = MakePair(dir_.path(), "b");
};

TEST_F(ServerStartTlsTest, AMatchingPairStarts) {
  EXPECT_TRUE(Start(a_.cert_file, a_.key_file).ok());
  std::string cert, key;
  EXPECT_TRUE(rpc::CheckTlsPair(b_.cert_file, b_.key_file, &cert, &key).ok());
  EXPECT_THAT(cert, HasSubstr("-----BEGIN CERTIFICATE-----"));
}

// Regression: a certificate without its key said only "cannot read ".
TEST_F(ServerStartTlsTest, CertWithoutKeyNamesTheMissingFlag) {
  absl::Status s = Start(a_.cert_file, "");
  EXPECT_EQ(s.code(), absl::StatusCode::kInvalidArgument);
  EXPECT_THAT(s.message(), HasSubstr("without --tls-key"));
  EXPECT_THAT(s.message(), HasSubstr(a_.cert_file));
  s = Start("", a_.key_file);
  EXPECT_EQ(s.code(), absl::StatusCode::kInvalidArgument);
  EXPECT_THAT(s.message(), HasSubstr("without --tls-cert"));
  EXPECT_THAT(s.message(), HasSubstr(a_.key_file));
}

// Regression: a key of another certificate failed late, as "cannot listen".
TEST_F(ServerStartTlsTest, MismatchedPairIsRefusedNamingBothFiles) {
  absl::Status s = Start(a_.cert_file, b_.key_file);
  EXPECT_EQ(s.code(), absl::StatusCode::kInvalidArgument);
  EXPECT_THAT(s.message(), HasSubstr("does not belong to the certificate"));
  EXPECT_THAT(s.message(), HasSubstr(a_.cert_file));
  EXPECT_THAT(s.message(), HasSubstr(b_.key_file));
}

TEST_F(ServerStartTlsTest, UnreadableOrNonPemFilesAreNamed) {
  const std::string missing = dir_.path() + "/no-such.crt";
  absl::Status s = Start(missing, a_.key_file);
  EXPECT_EQ(s.code(), absl::StatusCode::kInvalidArgument);
  EXPECT_THAT(s.message(), HasSubstr(missing));

  const std::string junk = dir_.path() + "/junk.pem";
  WriteFile(junk, "not a certificate\n");
  s = Start(junk, a_.key_file);
  EXPECT_EQ(s.code(), absl::StatusCode::kInvalidArgument);
  EXPECT_THAT(s.message(), HasSubstr("holds no PEM certificate"));
  EXPECT_THAT(s.message(), HasSubstr(junk));

  s = Start(a_.cert_file, junk);
  EXPECT_EQ(s.code(), absl::StatusCode::kInvalidArgument);
  EXPECT_THAT(s.message(), HasSubstr("holds no unencrypted PEM private key"));
  EXPECT_THAT(s.message(), HasSubstr(junk));

  // The certificate given as the key (and the other way round).
  s = Start(a_.cert_file, a_.cert_file);
  EXPECT_THAT(s.message(), HasSubstr("private key"));
  s = Start(a_.key_file, a_.key_file);
  EXPECT_THAT(s.message(), HasSubstr("holds no PEM certificate"));
}

// Regression: "host starts with 127." let a DNS name through as plaintext.
TEST(ServerStartLoopbackTest, ANameThatLooksLikeLoopbackGetsNoPlaintext) {
  TempDir dir;
  rpc::ServerOptions o;
  o.data_dir = dir.path();
  for (const char* listen : {"127.example.org:0", "127.0.0.1.example.org:0", "localhost.evil:0"}) {
    o.listen = listen;
    auto s = rpc::TickmarkServer::Start(o);
    EXPECT_EQ(s.status().code(), absl::StatusCode::kInvalidArgument) << listen;
    EXPECT_THAT(s.status().message(), HasSubstr("refusing plaintext")) << listen;
  }
  o.listen = "127.0.0.2:0";  // an IP literal in 127.0.0.0/8 is loopback
  auto ok = rpc::TickmarkServer::Start(o);
  EXPECT_TRUE(ok.ok()) << ok.status().message();
}

}  // namespace
}  // namespace tickmark::testing
